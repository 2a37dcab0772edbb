"""The ``pnpguard`` command line.

Verbs::

    pnpguard demo [--size N] [--seed N]    run the main demonstration
    pnpguard check DENOISER IMAGE          check a denoiser, print guarantees per algorithm
    pnpguard benchmark [SUITE]             run a benchmark suite into a result file
    pnpguard compare OLD NEW               compare two result files (exit 1 on a regression)
    pnpguard report RESULTS                write a markdown report with figures
    pnpguard list WHAT                     list suites, tasks, denoisers or phantoms
    pnpguard recover DATA --psf|--mask|--matrix FILE --sigma S
                                           reconstruct from files, write the result and a record

Exit status: 0 on success, 1 when ``compare`` finds a regression or ``recover`` is refused, 2 on a
usage error (printed as one line starting with ``pnpguard: error:``). Values are
checked while parsing, so a mistake never starts a run; unknown arguments are
refused with the verb's usage line.
"""

from __future__ import annotations

import argparse
import importlib
import math
import os
import sys
import warnings
import zipfile
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, NoReturn

import numpy as np

PROG = "pnpguard"

#: The verbs and their one-line help, in the order ``--help`` lists them. The overview
#: parser (``pnpguard --help``, ``--version``) is built from this table alone, so that
#: it imports nothing heavy; each verb's own parser is built by :func:`build_parser`.
VERBS = {
    "demo": "run the main demonstration",
    "check": "check a denoiser on an image and print the guarantees per algorithm",
    "benchmark": "run a benchmark suite and write a result file",
    "sweep": "check a shipped denoiser over a range of strengths",
    "compare": "compare two result files; exit status 1 on a regression",
    "report": "write a markdown report with figures from a result file",
    "recover": "reconstruct from data files with a guarantee, write the result and a JSON record",
    "list": "list suites, tasks, shipped denoisers or phantoms",
}

#: Smallest image side the verbs accept (the SSIM window and the blur kernels fit).
MIN_SIDE = 16

#: Largest seed: the searches seed torch generators, which take 64-bit signed integers.
MAX_SEED = 2**63 - 1


class UsageError(Exception):
    """A mistake in what the user asked for; reported as one line, exit status 2."""


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are one line and exit with status 2."""

    def error(self, message: str) -> NoReturn:
        raise UsageError(f"{message} (see '{self.prog} --help')")


# ------------------------------------------------------------------- helpers

def _task_problem(task_name: str, image_path: str) -> tuple[Any, Any]:
    """The task named on the command line and its problem built on the image file."""
    from .bench import get_task

    try:
        task = get_task(task_name)
    except ValueError as error:
        raise UsageError(str(error)) from None
    image = _load_image(image_path)
    try:
        problem = task.problem(image.shape, image=image)
    except ValueError as error:
        raise UsageError(f"task {task.name!r} cannot use this image: {error}") from None
    return task, problem

def _load_image(path: str) -> np.ndarray:
    """A grey float64 image from ``.npy`` or any format scikit-image reads."""
    file = Path(path)
    if file.is_dir():
        raise UsageError(f"image {path!r} is a directory; expected an image file")
    if not file.is_file():
        raise UsageError(f"image file {path!r} does not exist")
    try:
        if file.suffix.lower() == ".npy":
            image = np.load(file, allow_pickle=False)
        else:
            import skimage.io

            with warnings.catch_warnings():
                # Plugin discovery on unreadable files warns about deprecated readers.
                warnings.simplefilter("ignore", DeprecationWarning)
                image = skimage.io.imread(file)
    except Exception as error:  # noqa: BLE001 - any reader failure means a bad file
        raise UsageError(f"cannot read image {path!r}: {error}") from None
    image = np.asarray(image)
    if image.dtype == bool or not (np.issubdtype(image.dtype, np.integer) or np.issubdtype(image.dtype, np.floating)):
        raise UsageError(f"image {path!r} has dtype {image.dtype}; expected integer or float pixels")
    if image.ndim == 3 and image.shape[-1] in (3, 4):
        import skimage.color

        rgb = image[..., :3]
        if np.issubdtype(rgb.dtype, np.integer):
            rgb = rgb / float(np.iinfo(rgb.dtype).max)
        image = skimage.color.rgb2gray(rgb)
    elif np.issubdtype(image.dtype, np.integer):
        image = image / float(np.iinfo(image.dtype).max)
    if image.ndim != 2:
        raise UsageError(f"image {path!r} has shape {image.shape}; expected a 2-D grey or RGB(A) image")
    image = image.astype(np.float64)
    if not np.isfinite(image).all():
        raise UsageError(f"image {path!r} has non-finite pixels")
    if min(image.shape) < MIN_SIDE:
        height, width = image.shape
        raise UsageError(f"image {path!r} is {height}x{width}; use at least {MIN_SIDE}x{MIN_SIDE} pixels")
    return image


def _import_object(spec: str) -> Any:
    """``module:attribute`` (attribute may be dotted) -> the object; cwd is importable."""
    module_name, _, attribute = spec.partition(":")
    if not module_name or not attribute:
        raise UsageError(f"{spec!r} is not of the form module:attribute")
    sys.path.insert(0, os.getcwd())
    try:
        module = importlib.import_module(module_name)
    except Exception as error:  # noqa: BLE001 - the user's module may raise anything
        raise UsageError(f"cannot import module {module_name!r}: {type(error).__name__}: {error}") from None
    finally:
        sys.path.pop(0)
    obj = module
    for part in attribute.split("."):
        if not hasattr(obj, part):
            raise UsageError(f"module {module_name!r} has no attribute {attribute!r}")
        obj = getattr(obj, part)
    return obj


def _user_denoiser(spec: str, strength: float | None) -> Any:
    import torch

    from .denoisers import Denoiser, as_denoiser

    obj = _import_object(spec)
    if isinstance(obj, type):
        raise UsageError(
            f"{spec!r} is a class; give an instance (a Denoiser or torch module) or a function "
            "image -> image"
        )
    if isinstance(obj, Denoiser):
        if strength is not None:
            raise UsageError(f"{spec!r} is already a Denoiser; --strength applies to functions and modules only")
        return obj
    if not (callable(obj) or isinstance(obj, torch.nn.Module)):
        raise UsageError(
            f"{spec!r} is an object of type {type(obj).__name__}; expected a Denoiser, a torch module "
            "or a function image -> image"
        )
    return as_denoiser(obj, name=spec.partition(":")[2], sigma=strength)


def _strength_for(name: str, task: str, given: float | None) -> tuple[float, str]:
    from .bench import get_denoiser, load_tuned

    if given is not None:
        return given, "given"
    try:
        return load_tuned().strength(task, name), f"tuned for task {task}"
    except (KeyError, FileNotFoundError, ValueError):
        return get_denoiser(name).default_strength, "registry default"


def _integer(low: int, high: int | None = None, *, expected: str | None = None) -> Callable[[str], int]:
    """An argparse type: an integer in ``[low, high]`` (no upper end when ``high`` is None)."""
    if expected is None:
        if high is not None:
            expected = f"an integer from {low} to {high}"
        else:
            expected = "a positive integer" if low == 1 else f"an integer >= {low}"

    def convert(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {expected}, got {text!r}") from None
        if value < low or (high is not None and value > high):
            raise argparse.ArgumentTypeError(f"expected {expected}, got {text!r}")
        return value

    return convert


def _number(text: str, expected: str, admissible: Callable[[float], bool]) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected {expected}, got {text!r}") from None
    if not (np.isfinite(value) and admissible(value)):
        raise argparse.ArgumentTypeError(f"expected {expected}, got {text!r}")
    return value


def _nonnegative_float(text: str) -> float:
    return _number(text, "a non-negative number", lambda value: value >= 0)


def _positive_float(text: str) -> float:
    return _number(text, "a positive number", lambda value: value > 0)


def _fraction(text: str) -> float:
    return _number(text, "a number in [0, 1)", lambda value: 0 <= value < 1)


_positive_int = _integer(1)
_seed = _integer(0, MAX_SEED, expected="an integer from 0 to 2**63 - 1")
_side = _integer(MIN_SIDE)
# torch crashes the interpreter on absurd thread counts: allow up to the machine's CPUs.
_CPUS = os.cpu_count() or 1
_threads = _integer(1, _CPUS, expected=f"an integer from 1 to {_CPUS} (the CPUs of this machine)")
_THREADS_HELP = (
    "torch threads, at most the machine's CPUs (default: the CPUs idle when the run starts, so a "
    "run beside another busy process does not oversubscribe the machine)"
)


def _workers(text: str) -> int | str:
    if text == "auto":
        return text
    return _integer(1, expected="a positive integer or 'auto'")(text)


#: ``--accelerate`` choices and the solvers' ``accelerate`` values they stand for.
ACCELERATE = {"auto": "auto", "on": True, "off": False}


def _add_progress_option(verb: argparse.ArgumentParser) -> None:
    """``--progress`` / ``--no-progress``: a progress bar on standard error (default: on a terminal)."""
    verb.add_argument("--progress", action=argparse.BooleanOptionalAction, default=None,
                      help="progress bar on standard error (default: when it is a terminal)")


def _add_worker_options(verb: argparse.ArgumentParser) -> None:
    """``--workers`` / ``--scheduler``: where a verb's independent jobs run (default: serially)."""
    where = verb.add_mutually_exclusive_group()
    where.add_argument("--workers", type=_workers, default=None, metavar="N",
                       help="run the jobs on a local dask.distributed cluster of N single-threaded "
                       "worker processes ('auto': one per CPU); default: serially")
    where.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="run the jobs on an existing dask.distributed cluster, e.g. "
                       "tcp://10.0.0.5:8786")


def _aspects(text: str) -> tuple[str, ...]:
    from .bench import ASPECTS

    values = tuple(part.strip() for part in text.split(",") if part.strip())
    unknown = [v for v in values if v not in ASPECTS]
    if unknown or not values:
        raise argparse.ArgumentTypeError(
            f"expected a comma-separated list of {', '.join(ASPECTS)}, got {text!r}"
        )
    return values


# --------------------------------------------------------------------- verbs
def _demo(args: argparse.Namespace) -> int:
    from ._threads import torch_threads
    from .demo import run_demo

    with torch_threads(args.threads):
        run_demo(size=args.size, seed=args.seed)
    return 0


def _check(args: argparse.Namespace) -> int:
    from ._threads import torch_threads
    from .bench import CAUTION, denoiser_names, get_denoiser
    from .check import check_denoiser
    from .guarantee import Refused, admissible

    task, problem = _task_problem(args.task, args.image)
    user = ":" in args.denoiser
    if user:
        denoiser = _user_denoiser(args.denoiser, args.strength)
        how = "user's"
    else:
        if args.denoiser not in denoiser_names():
            try:
                get_denoiser(args.denoiser)
            except ValueError as error:
                raise UsageError(f"{error}, or give a Python callable as module:attribute") from None
        strength, how = _strength_for(args.denoiser, task.name, args.strength)
        denoiser = get_denoiser(args.denoiser).make(strength, problem.shape)
        how = f"strength {strength:g} ({how})"
    print(f"image {args.image}: {problem.shape[0]}x{problem.shape[1]}, task {task.name} ({task.family}), "
          f"noise {100 * task.noise:g} % of the data peak (sigma = {problem.sigma:.4g})")
    print(f"denoiser {denoiser.name}: {how}")
    print()
    try:
        with torch_threads(args.threads):
            report = check_denoiser(
                denoiser, problem.start(), budget=args.budget, seed=args.seed, cross_check=args.cross_check
            )
    except Exception as error:
        if not user:
            raise
        raise UsageError(f"the denoiser {args.denoiser!r} failed: {type(error).__name__}: {error}") from None
    print(report)
    for algorithm in args.algorithms:
        print()
        try:
            print(admissible(algorithm, problem.fidelity, report, margin=args.margin))
        except Refused as refusal:
            print(f"guarantee for {algorithm}: REFUSED")
            print("\n".join(f"  {line}" for line in str(refusal).splitlines()))
    if task.family == "tomography":
        print()
        print(CAUTION)
    return 0


def _benchmark(args: argparse.Namespace) -> int:
    from .bench import (
        CAUTION,
        custom_suite,
        family_gaps,
        rule_gaps,
        get_suite,
        load_tuned,
        ranking,
        run_suite,
    )

    try:
        suite = get_suite(args.suite)
        if args.tasks or args.size or args.max_iter:
            suite = custom_suite(
                args.tasks or [t.name for t in suite.tasks],
                shape=(args.size, args.size) if args.size else suite.shape,
                max_iter=args.max_iter or suite.max_iter,
                tol=suite.tol,
                check_budget=suite.check_budget,
                name=f"{suite.name}-custom",
            )
        tuned = load_tuned(args.tuned)
    except (ValueError, FileNotFoundError) as error:
        raise UsageError(str(error)) from None
    output = Path(args.output or f"benchmark-{suite.name}.json")
    if output.is_dir():
        raise UsageError(f"argument --output: {str(output)!r} is a directory; expected a file name")
    try:
        run = run_suite(
            suite,
            tuned=tuned,
            methods=args.methods,
            check_budget=args.check_budget,
            seed=args.seed,
            threads=args.threads,
            progress=sys.stderr.isatty() if args.progress is None else args.progress,
            workers=args.workers,
            scheduler=args.scheduler,
            strength_rule=args.strength_rule,
        )
    except (ValueError, KeyError) as error:
        raise UsageError(str(error.args[0])) from None
    try:
        path = run.save(output, images=args.images)
    except OSError as error:
        reason = error.strerror or error
        raise UsageError(f"cannot write the results to {str(output)!r}: {reason}") from None
    document = run.document
    print(f"suite {suite.name}: {len(document['results'])} runs in {document['seconds']:.1f} s")
    for task in document["tasks"]:
        ranked = ranking(document, task["name"])[:3]
        top = ", ".join(f"{r['method']} {r['psnr']:.2f} dB" for r in ranked)
        print(f"  {task['name']}: {top}")
    for gap in family_gaps(document):
        if math.isnan(gap.mean_gap):
            print(f"  {gap.family}: no gap (some task lacks a successful PnP or baseline run)")
            continue
        print(f"  {gap.family}: best PnP - best baseline = {gap.mean_gap:+.2f} dB on average"
              f" ({'goal met' if gap.goal_met else 'goal of +1 dB not met'})")
    for family, methods in rule_gaps(document).items():
        for method, gap in methods.items():
            print(f"  {family}: {method} picks {gap:+.2f} dB from the best strength it tried (mean)")
    npz = path.with_suffix(".npz")
    print(f"wrote {path}" + (f" and {npz}" if args.images and npz.is_file() else ""))
    if document.get("caution"):
        print(CAUTION)
    return 0


def _sweep(args: argparse.Namespace) -> int:
    from .bench import denoiser_names, get_denoiser
    from .strength import sweep_check

    if args.denoiser not in denoiser_names():
        try:
            get_denoiser(args.denoiser)
        except ValueError as error:
            raise UsageError(str(error)) from None
    task, problem = _task_problem(args.task, args.image)
    entry = get_denoiser(args.denoiser)
    if args.strengths:
        strengths = args.strengths
    else:
        low, high = args.range
        if not low < high:
            raise UsageError(f"argument --range: expected LOW < HIGH, got {low:g} {high:g}")
        strengths = list(np.geomspace(low, high, args.points))
    sweep = sweep_check(
        _RegistryFactory(entry.name, problem.shape), problem.fidelity, strengths,
        algorithms=args.algorithms, budget=args.budget, seed=args.seed, margin=args.margin,
        workers=args.workers, scheduler=args.scheduler,
        progress=sys.stderr.isatty() if args.progress is None else args.progress,
    )
    names = list(sweep.algorithms)
    rows = []
    for point in sweep.points:
        windows = [
            "refused" if point.windows[n] is None else f"({point.windows[n][0]:.3g}, {point.windows[n][1]:.3g})"
            for n in names
        ]
        constants = [f"{v:.4g}" if v is not None else "-" for v in (point.theta, point.lipschitz,
                                                                      point.residual_lipschitz)]
        rows.append([f"{point.strength:.4g}", point.verdict or "failed", *constants, *windows])
    header = ["strength", "verdict", "theta", "lipschitz", "residual", *names]
    print(f"denoiser {entry.name} ({entry.strength}) on task {task.name}, image {args.image}")
    print(_table(header, rows))
    output = Path(args.output or f"sweep-{entry.name}.json")
    try:
        sweep.save(output)
        if args.figure:
            sweep.plot(title=f"{entry.name} on {task.name}").savefig(args.figure, dpi=150)
    except OSError as error:
        raise UsageError(f"cannot write the sweep: {error.strerror or error}") from None
    print(f"wrote {output}" + (f" and {args.figure}" if args.figure else ""))
    return 0


class _RegistryFactory:
    """``strength -> denoiser`` for a shipped denoiser (picklable, for workers)."""

    def __init__(self, name: str, shape: tuple[int, int]):
        self.name, self.shape = name, shape

    def __call__(self, strength: float) -> Any:
        from .bench import get_denoiser

        return get_denoiser(self.name).make(strength, self.shape)


def _compare(args: argparse.Namespace) -> int:
    from .bench import compare_results, load_results

    try:
        old, new = load_results(args.old), load_results(args.new)
        comparison = compare_results(
            old, new, aspects=args.aspects, psnr_tol=args.psnr_tol, ssim_tol=args.ssim_tol,
            time_ratio=args.time_ratio,
        )
    except (ValueError, FileNotFoundError) as error:
        raise UsageError(str(error)) from None
    print(comparison)
    return 0 if comparison.passed else 1


def _report(args: argparse.Namespace) -> int:
    from .bench import CAUTION, load_arrays, load_results, write_report

    try:
        document = load_results(args.results)
    except (ValueError, FileNotFoundError) as error:
        raise UsageError(str(error)) from None
    try:
        arrays = {} if args.no_figures else load_arrays(args.results, document)
    except (OSError, ValueError, zipfile.BadZipFile) as error:
        raise UsageError(f"cannot read the images saved with {args.results!r}: {error}") from None
    directory = Path(args.output or Path(args.results).with_suffix("").name + "-report")
    try:
        path = write_report(document, directory, arrays=arrays)
    except ImportError as error:
        raise UsageError(str(error)) from None
    except OSError as error:
        reason = error.strerror or error
        raise UsageError(f"cannot write the report to {str(directory)!r}: {reason}") from None
    print(f"wrote {path}" + (" and figures" if arrays else " (no figures: no images saved with the results)"))
    if document.get("caution"):
        print(CAUTION)
    return 0


def _list(args: argparse.Namespace) -> int:
    if args.what == "phantoms":
        from . import phantoms

        print("\n".join(phantoms.phantom_names()))
        return 0
    from ._catalogue import ALGORITHM_COLUMNS, TASK_COLUMNS, read_catalogue

    catalogue = read_catalogue()  # the tables, stored so that listing imports no torch
    if args.what == "tasks":
        print(_table(TASK_COLUMNS, catalogue["tasks"]))
    elif args.what == "algorithms":
        print(_table(ALGORITHM_COLUMNS, catalogue["algorithms"]))
    else:
        print("\n".join(catalogue[args.what]))
    return 0


def _recover(args: argparse.Namespace) -> int:
    from . import _recover as rec
    from ._caution import CAUTION
    from ._imagefiles import NPY_SUFFIXES, PNG_SUFFIXES, TIFF_SUFFIXES, ImageFileError, read_image, write_image
    from .bench import get_denoiser
    from .check import check_denoiser
    from .fidelity import LeastSquares
    from .guarantee import Refused, admissible
    from .solvers import reconstruct

    # Everything that can be refused is refused here, before any work.
    data_path = Path(args.data)
    output = Path(args.output) if args.output else data_path.with_name(f"{data_path.stem}-recovered{data_path.suffix}")
    if not any(data_path.suffix.lower() in k and output.suffix.lower() in k
               for k in (PNG_SUFFIXES, TIFF_SUFFIXES, NPY_SUFFIXES)):
        raise UsageError(f"argument --output: {str(output)!r} must have the data's kind of suffix "
                         f"({data_path.suffix}), to keep its format and bit depth")
    record_path = output.with_suffix(".json")
    if output.resolve() == data_path.resolve():
        raise UsageError(f"argument --output: {str(output)!r} is the data file; choose another name")
    if (args.image_shape is None) != (args.matrix is None):
        raise UsageError("--image-shape H W goes with --matrix (the matrix's columns are the image's pixels)")
    if args.norm is not None and args.matrix is None:
        raise UsageError("--norm (a claimed operator norm) goes with --matrix")
    try:
        rec.check_writable([output, record_path], args.overwrite)
        data = read_image(args.data, what="data", value_range=tuple(args.range) if args.range else None)
        if args.psf is not None:
            op, model = rec.psf_operator(args.psf, data.frame_shape)
        elif args.mask is not None:
            op, model = rec.mask_operator(args.mask, data.frame_shape)
        else:
            op, model = rec.matrix_operator(args.matrix, tuple(args.image_shape), data.frame_shape, args.norm)
    except ImageFileError as error:
        raise UsageError(str(error)) from None
    user = ":" in args.denoiser
    if user:
        denoiser = _user_denoiser(args.denoiser, args.strength)
        how = "user's"
    else:
        try:
            entry = get_denoiser(args.denoiser)
        except ValueError as error:
            raise UsageError(f"{error}, or give a Python callable as module:attribute") from None
        strength = entry.default_strength if args.strength is None else args.strength
        try:
            denoiser = entry.make(strength, op.in_shape)
        except ValueError as error:
            raise UsageError(f"denoiser {args.denoiser!r} cannot take {op.in_shape} images: {error}") from None
        how = f"strength {strength:g} ({'given' if args.strength is not None else 'registry default'})"
    notes = []
    if data.layout == "colour":
        notes.append(
            f"colour: the {data.values.shape[0]} channels are reconstructed as one (1, C, H, W) batch; "
            + ("the denoiser is given that batch as it is" if user
               else f"{args.denoiser} is a grey-level denoiser, applied to each channel separately")
        )
    elif data.layout == "stack":
        notes.append(f"stack: the {data.values.shape[0]} frames are reconstructed as one (N, 1, H, W) batch")
    bound = op.norm_bound()
    print(f"data {args.data}: {data.layout} {'x'.join(map(str, data.values.shape))}, {data.scaling()}")
    print(f"forward model: {op!r}; norm {bound.value:.6g} ({bound.basis}: {bound.method})")
    print(f"denoiser {denoiser.name}: {how}")
    for note in notes:
        print(f"note: {note}")
    print()

    fidelity = LeastSquares(op, rec.as_batch(data.values, data.layout), sigma=args.sigma)
    # One check per denoiser and strength, on one frame (channel) of the first iterate: the
    # denoiser acts on each frame alike, so its constants hold for the whole batch.
    sample = fidelity.start_image().reshape(-1, *op.in_shape)[0]
    try:
        report = check_denoiser(denoiser, sample, budget=args.budget, seed=args.seed)
    except Exception as error:
        if not user:
            raise
        raise UsageError(f"the denoiser {args.denoiser!r} failed: {type(error).__name__}: {error}") from None
    print(f"{report}\n")
    try:
        guarantee = admissible(args.algorithm, fidelity, report, margin=args.margin)
    except Refused as refusal:
        print(f"guarantee for {args.algorithm}: REFUSED (nothing written)")
        print("\n".join(f"  {line}" for line in str(refusal).splitlines()))
        return 1
    print(f"{guarantee}\n")
    progress = sys.stderr.isatty() if args.progress is None else args.progress
    result = reconstruct(args.algorithm, fidelity, denoiser, report=report, max_iter=args.max_iter, tol=args.tol,
                         margin=args.margin, seed=args.seed, progress=progress,
                         accelerate=ACCELERATE[args.accelerate])
    print(result)
    values = rec.from_batch(result.x, data.layout)
    parameters = {"sigma": args.sigma, "denoiser": args.denoiser, "denoiser_strength": how,
                  "algorithm": args.algorithm, "max_iter": args.max_iter, "tol": args.tol,
                  "accelerate": args.accelerate, "budget": args.budget, "seed": args.seed, "margin": args.margin}
    written: dict[str, int] = {}

    def write_output(path: Path) -> None:
        written["clipped"] = write_image(path, values, data)

    def write_document(path: Path) -> None:
        rec.write_record(path, rec.record(data=data, model=model, op=op, parameters=parameters, result=result,
                                          output=output, clipped=written["clipped"], notes=notes))

    try:
        rec.write_all([(output, write_output), (record_path, write_document)])
    except OSError as error:
        raise UsageError(f"cannot write the outputs ({error.strerror or error}); nothing was written") from None
    clipped = written["clipped"]
    print(f"\nwrote {output} ({data.storing()}" + (f"; {clipped} values clipped" if clipped else "")
          + f") and {record_path}")
    print(CAUTION)
    return 0


def _algorithm(text: str) -> str:
    """An algorithm's API name from its name or short name (argparse type)."""
    from .splitting import algorithm

    try:
        return algorithm(text).name
    except ValueError as error:
        raise argparse.ArgumentTypeError(str(error)) from None


def _table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    """A plain-text table: the header, a rule, the rows; columns left-aligned, two spaces apart."""
    widths = [max(len(cell) for cell in column) for column in zip(header, *rows)]
    lines = [header, ["-" * width for width in widths], *rows]
    return "\n".join(
        "  ".join(cell.ljust(width) for cell, width in zip(line, widths)).rstrip() for line in lines
    )


# -------------------------------------------------------------------- parser
def _overview_parser() -> tuple[argparse.ArgumentParser, Any]:
    """The top-level parser and its verb group, without any verb's arguments (imports nothing heavy)."""
    from . import __version__

    parser = _Parser(
        prog=PROG,
        description="Convergent plug-and-play image reconstruction: check denoisers, get "
        "step-size guarantees, run and compare benchmark suites.",
    )
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    verbs = parser.add_subparsers(dest="verb", metavar="VERB", required=True)
    return parser, verbs


def overview_parser() -> argparse.ArgumentParser:
    """The parser of ``pnpguard --help`` and ``--version``: every verb of :data:`VERBS`, no verb's arguments."""
    parser, verbs = _overview_parser()
    for name, text in VERBS.items():
        verbs.add_parser(name, help=text)
    return parser


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``pnpguard`` command."""
    from .bench import DEFAULT_PSNR_TOL, DEFAULT_SSIM_TOL, suite_names
    from .check._check import MIN_BUDGET
    from .demo import DEFAULT_SEED, DEFAULT_SIZE, MIN_SIZE
    from .splitting import ALGORITHMS

    parser, verbs = _overview_parser()

    demo = verbs.add_parser("demo", help=VERBS["demo"],
                            description="Run the main demonstration of the library: deblur a "
                            "synthetic microscope frame of cells with a guarantee, and show the "
                            "refusal of a black-box denoiser.")
    demo.add_argument("--size", type=_integer(MIN_SIZE), default=DEFAULT_SIZE, metavar="N",
                      help=f"side of the frame in pixels, at least {MIN_SIZE} (default: %(default)s)")
    demo.add_argument("--seed", type=_seed, default=DEFAULT_SEED, metavar="N",
                      help="seed of the frame and of the noise (default: %(default)s)")
    demo.add_argument("--threads", type=_threads, default=None, help=_THREADS_HELP)
    demo.set_defaults(run=_demo)

    check = verbs.add_parser(
        "check",
        help=VERBS["check"],
        description="Measure a denoiser's averagedness and Lipschitz constants on a sample "
        "image (a proof for denoisers with verified structure, a search otherwise) and print, "
        "for each PnP algorithm, the admissible step and relaxation or the reasons for refusal. "
        "The forward model and noise come from a benchmark task applied to the image.",
    )
    check.add_argument("denoiser", help="a shipped denoiser name (see 'pnpguard list denoisers') or "
                       "a Python callable or torch module as module:attribute (importable from "
                       "the current directory)")
    check.add_argument("image", help="sample image: .npy or any format scikit-image reads "
                       "(integer images are scaled to [0, 1], colour converted to grey)")
    check.add_argument("--task", default="deblur-gaussian-1pct",
                       help="benchmark task giving the forward model and noise (default: %(default)s)")
    check.add_argument("--strength", type=_positive_float, default=None,
                       help="denoiser strength (shipped denoisers: default the tuned value for the "
                       "task; callables: recorded as their noise level)")
    check.add_argument("--budget", type=_integer(MIN_BUDGET), default=200,
                       help=f"denoiser calls for a black-box check, at least {MIN_BUDGET} "
                       "(default: %(default)s)")
    check.add_argument("--seed", type=_seed, default=0, help="seed of the check's search (default: 0)")
    check.add_argument("--margin", type=_fraction, default=0.05,
                       help="relative inflation of estimated constants, in [0, 1) (default: %(default)s)")
    check.add_argument("--algorithms", nargs="+", type=_algorithm, default=list(ALGORITHMS), metavar="NAME",
                       help="algorithms to give guarantees for, by name or short name "
                            f"(default: all: {', '.join(ALGORITHMS)})")
    check.add_argument("--cross-check", action="store_true",
                       help="also search pairs when the structure proves the constants")
    check.add_argument("--threads", type=_threads, default=None, help=_THREADS_HELP)
    check.set_defaults(run=_check)

    bench = verbs.add_parser(
        "benchmark",
        help=VERBS["benchmark"],
        description="Run every task of a suite with every guarded PnP method (algorithm x "
        "shipped denoiser) and the classical baselines, with the frozen tuned parameters; "
        "write a JSON result file and, unless --no-images, the images beside it (.npz).",
    )
    bench.add_argument("suite", nargs="?", default="quick",
                       help=f"suite name: {', '.join(suite_names())} (default: %(default)s)")
    bench.add_argument("--output", "-o", default=None,
                       help="result file (default: benchmark-<suite>.json)")
    bench.add_argument("--tasks", nargs="+", default=None, help="run only these tasks")
    bench.add_argument("--methods", nargs="+", default=None,
                       help="run only these methods, e.g. tikhonov fb/wavelet")
    bench.add_argument("--size", type=_side, default=None,
                       help=f"image side in pixels, at least {MIN_SIDE} (default: the suite's)")
    bench.add_argument("--max-iter", type=_positive_int, default=None, help="iteration cap of PnP runs (default: the suite's)")
    bench.add_argument("--check-budget", type=_integer(MIN_BUDGET), default=None,
                       help=f"denoiser calls per black-box check, at least {MIN_BUDGET} "
                       "(default: the suite's)")
    bench.add_argument("--seed", type=_seed, default=0, help="seed of the denoiser checks (default: 0)")
    bench.add_argument("--threads", type=_threads, default=1,
                       help="torch threads, at most the machine's CPUs; 1 (default) gives identical "
                       "numbers on reruns")
    bench.add_argument("--tuned", default=None, help="tuned-parameter file (default: the shipped one)")
    bench.add_argument("--images", action=argparse.BooleanOptionalAction, default=True,
                       help="save truths, data, reconstructions and residual curves (.npz)")
    _add_progress_option(bench)
    bench.add_argument("--strength-rule", choices=("discrepancy", "sure"), default=None,
                       help="also run every PnP method at the strength this rule picks on the task's own "
                       "data, without ground truth (named METHOD@RULE; slower: one run per strength tried)")
    _add_worker_options(bench)
    bench.set_defaults(run=_benchmark)

    sweep = verbs.add_parser(
        "sweep",
        help=VERBS["sweep"],
        description="Check a shipped denoiser at several strengths on a sample image and a task's "
        "forward model: its constants (theta, Lipschitz, residual Lipschitz), the verdict and each "
        "algorithm's admissible step window or refusal. Writes JSON and, with --figure, a PNG.",
    )
    sweep.add_argument("denoiser", help="a shipped denoiser name (see 'pnpguard list denoisers')")
    sweep.add_argument("image", help="sample image: .npy or any format scikit-image reads")
    sweep.add_argument("--task", default="deblur-gaussian-1pct",
                       help="task whose forward model and noise level are used (default: %(default)s)")
    strengths = sweep.add_mutually_exclusive_group()
    strengths.add_argument("--strengths", nargs="+", type=_positive_float, default=None, metavar="S",
                           help="the strengths to check")
    strengths.add_argument("--range", nargs=2, type=_positive_float, default=(1e-3, 1e-1),
                           metavar=("LOW", "HIGH"), help="geometric grid from LOW to HIGH (default: 1e-3 0.1)")
    sweep.add_argument("--points", type=_integer(2), default=7, help="points of the --range grid (default: 7)")
    sweep.add_argument("--algorithms", nargs="+", type=_algorithm, default=list(ALGORITHMS), metavar="NAME",
                       help="algorithms whose windows are computed (default: all)")
    sweep.add_argument("--budget", type=_integer(MIN_BUDGET), default=200,
                       help=f"denoiser calls per black-box check, at least {MIN_BUDGET} (default: 200)")
    sweep.add_argument("--seed", type=_seed, default=0, help="seed of the checks' search (default: 0)")
    sweep.add_argument("--margin", type=_fraction, default=0.05,
                       help="safety margin on estimated constants (default: 0.05)")
    sweep.add_argument("--output", "-o", default=None, help="JSON file (default: sweep-<denoiser>.json)")
    sweep.add_argument("--figure", default=None, help="also write the figure (PNG) here")
    _add_progress_option(sweep)
    _add_worker_options(sweep)
    sweep.set_defaults(run=_sweep)

    compare = verbs.add_parser(
        "compare",
        help=VERBS["compare"],
        description="Compare a new result file with an old (baseline) one: PSNR/SSIM drops "
        "beyond the tolerances, changed run status, check verdict or guarantee, new monitor "
        "flags, missing runs (and, on request, timings). Exit status 1 on a regression.",
    )
    compare.add_argument("old", help="baseline result file")
    compare.add_argument("new", help="new result file")
    compare.add_argument("--psnr-tol", type=_nonnegative_float, default=DEFAULT_PSNR_TOL,
                         help="allowed PSNR drop in dB (default: %(default)s)")
    compare.add_argument("--ssim-tol", type=_nonnegative_float, default=DEFAULT_SSIM_TOL,
                         help="allowed SSIM drop (default: %(default)s)")
    compare.add_argument("--aspects", type=_aspects, default=("flags", "quality", "verdicts"),
                         help="comma-separated aspects to check among flags, quality, timings, "
                         "verdicts (default: flags,quality,verdicts)")
    compare.add_argument("--time-ratio", type=_positive_float, default=2.0,
                         help="with timings: allowed slow-down factor (default: %(default)s)")
    compare.set_defaults(run=_compare)

    report = verbs.add_parser(
        "report",
        help=VERBS["report"],
        description="Write report.md (task x method table, ranking per task, best PnP against "
        "best baseline per family, guarantees and flags) and PNG figures (image panels, "
        "residual curves; needs matplotlib and the images saved with the results).",
    )
    report.add_argument("results", help="result file written by 'pnpguard benchmark'")
    report.add_argument("--output", "-o", default=None, help="directory (default: <results>-report)")
    report.add_argument("--no-figures", action="store_true", help="write the markdown only")
    report.set_defaults(run=_report)

    recover = verbs.add_parser(
        "recover",
        help=VERBS["recover"],
        description="Reconstruct from your own files: the data (PNG, TIFF including 16-bit and "
        "stacks, or .npy; colour images and stacks run as one batch) and the forward model (a PSF "
        "file, a binary mask file or a system matrix as .npy or sparse .npz). The denoiser is "
        "checked once, the guarantee (or the refusal) printed, the guarded iteration run, and the "
        "result written in the data's format and bit depth with a JSON record beside it "
        "(checksums, parameters, check, guarantee, monitor flags, versions). Exit status 1 when "
        "the guarantee is refused (nothing is written).",
    )
    recover.add_argument("data", help="measured data: .png, .tif/.tiff or .npy (integer pixels are "
                         "scaled to [0, 1] by their range)")
    model = recover.add_mutually_exclusive_group(required=True)
    model.add_argument("--psf", help="point-spread function (.npy or an image), normalised to unit sum; "
                       "periodic convolution")
    model.add_argument("--mask", help="binary mask of observed pixels (.npy or an image), 0 = missing")
    model.add_argument("--matrix", help="system matrix: dense .npy or sparse .npz (scipy.sparse.save_npz), "
                       "rows = data entries, columns = pixels, both row-major")
    recover.add_argument("--image-shape", nargs=2, type=_positive_int, metavar=("H", "W"),
                         help="image size the matrix's columns describe (with --matrix)")
    recover.add_argument("--norm", type=_positive_float, default=None,
                         help="your claim of the matrix's 2-norm (recorded as a claim; default: "
                         "certified or estimated)")
    recover.add_argument("--sigma", type=_positive_float, required=True,
                         help="noise standard deviation in the data's units after scaling")
    recover.add_argument("--range", nargs=2, type=float, metavar=("LOW", "HIGH"), default=None,
                         help="range of the integer pixel values (e.g. 0 4095 for 12-bit data in a "
                         "16-bit file; default: the full range of the type)")
    recover.add_argument("--denoiser", default="wavelet",
                         help="shipped denoiser name or module:attribute (default: %(default)s)")
    recover.add_argument("--strength", type=_positive_float, default=None,
                         help="denoiser strength (default: the registry's)")
    recover.add_argument("--algorithm", type=_algorithm, default="forward_backward",
                         help="algorithm by name or short name (default: %(default)s)")
    recover.add_argument("--output", "-o", default=None,
                         help="result file, same kind as the data (default: <data>-recovered.<suffix>); "
                         "the JSON record is written beside it with suffix .json")
    recover.add_argument("--overwrite", action="store_true", help="replace existing outputs")
    recover.add_argument("--max-iter", type=_positive_int, default=300, help="iteration cap (default: %(default)s)")
    recover.add_argument("--tol", type=_positive_float, default=1e-4,
                         help="relative fixed-point residual at which to stop (default: %(default)s)")
    recover.add_argument("--accelerate", choices=tuple(ACCELERATE), default="auto",
                         help="safeguarded Anderson acceleration: on, off, or auto (default: on for "
                         "guarded fixed-point runs with an exact denoiser)")
    recover.add_argument("--budget", type=_integer(MIN_BUDGET), default=200,
                         help=f"denoiser calls for a black-box check, at least {MIN_BUDGET} (default: %(default)s)")
    recover.add_argument("--seed", type=_seed, default=0, help="seed of the check's search (default: 0)")
    recover.add_argument("--margin", type=_fraction, default=0.05,
                         help="relative inflation of estimated constants, in [0, 1) (default: %(default)s)")
    _add_progress_option(recover)
    recover.set_defaults(run=_recover)

    _add_list(verbs)
    _set_usage(verbs)
    return parser


def _add_list(verbs: Any) -> None:
    listing = verbs.add_parser("list", help=VERBS["list"],
                               description="List what the other verbs accept by name.")
    listing.add_argument("what", choices=("algorithms", "denoisers", "phantoms", "suites", "tasks"))
    listing.set_defaults(run=_list)


def _set_usage(verbs: Any) -> None:
    for verb in verbs.choices.values():
        # One line naming everything the verb accepts, for the unknown-argument error.
        verb.set_defaults(usage=" ".join(verb.format_usage().split()))


def _parser_for(words: Sequence[str]) -> argparse.ArgumentParser:
    """The parser ``words`` need: only a verb's own arguments need the library imported.

    Help, version and usage errors before a verb come from the overview parser;
    ``list`` gets a parser of its own verb only (its arguments need nothing heavy).
    """
    verb = next((word for word in words if not word.startswith("-")), None)
    if verb == "list":
        parser, verbs = _overview_parser()
        _add_list(verbs)
        _set_usage(verbs)
        return parser
    return build_parser() if verb in VERBS else overview_parser()


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit status.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments without the program name; default ``sys.argv[1:]``.
    """
    try:
        words = sys.argv[1:] if argv is None else list(argv)
        args, extra = _parser_for(words).parse_known_args(words)
        if extra:
            raise UsageError(f"unrecognized arguments: {' '.join(extra)}; {args.usage}")
        return args.run(args)
    except UsageError as error:
        # One line, whatever the message (a user's exception may span several).
        print(f"{PROG}: error: {' '.join(line.strip() for line in str(error).splitlines())}",
              file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader of our output went away (e.g. `| head`): stop quietly. Python's
        # signal documentation, "Note on SIGPIPE", recommends pointing stdout at devnull.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1


if __name__ == "__main__":
    sys.exit(main())
