"""Matrix-free pixel-footprint projection: the system matrix's entries computed on the fly.

The kernel behind the matrix-free path of :class:`~pnpguard.ParallelProjection`.
For every (angle, pixel) pair the three detector weights of the pixel's
footprint are recomputed from the geometry in the input's precision, block by
block over angles and image lines, so memory stays at a few fixed-size work
buffers whatever the scan size. The forward map scatters pixel values into
bins, the adjoint gathers bin values back with the same computed weights, so
the two are exact transposes of one matrix (up to the order of summation).
"""

from __future__ import annotations

import numpy as np
import torch

from ._cache import TransferCache

#: About this many (angle, pixel) pairs are processed together: the block's
#: work buffers (eleven of this length) stay in the last-level cache while each
#: tensor operation still covers enough pairs to hide its fixed cost (2^16 and
#: 2^18 were both slower at 256 x 256 with 180 angles).
BLOCK_PAIRS = 1 << 17

#: Block size when torch runs several threads: below torch's parallel grain
#: (32768 elements), so no operation of a block opens a parallel region.
#: Each region wakes the other threads, and on a machine that other processes
#: keep busy every wake-up waits for a free core (measured: 2 threads beside a
#: load of 8 on 2 cores made a product 10-20 times slower with BLOCK_PAIRS).
SERIAL_BLOCK_PAIRS = (1 << 15) - 1


#: The weights computed by a product are kept for the next ones while all kept
#: weights (every precision together) take at most this many bytes. At 256 x 256
#: with 180 angles they take 107 MB in float32 and 143 MB in float64 (both fit),
#: and a forward + adjoint then costs about two thirds of the time of one that
#: recomputes them (``benchmarks/bench_projector_scale.py``); at 512 x 512 with
#: 360 angles they would take 0.85-1.14 GB, so such scans recompute them.
WEIGHT_CACHE_BYTES = 2**28


def _block_pairs() -> int:
    """Pairs per block for torch's current thread count."""
    return BLOCK_PAIRS if torch.get_num_threads() == 1 else SERIAL_BLOCK_PAIRS


def _flipped(images: torch.Tensor, axes: tuple[int, ...]) -> torch.Tensor:
    """A contiguous copy of ``(count, lines, length)`` images flipped along ``axes``.

    Copied in pieces of at most :data:`SERIAL_BLOCK_PAIRS` elements, for the
    reason given there.
    """
    flipped = torch.empty_like(images, memory_format=torch.contiguous_format)
    lines = images.shape[1]
    step = max(1, SERIAL_BLOCK_PAIRS // (images.shape[0] * images.shape[2]))
    for start in range(0, lines, step):
        stop = min(lines, start + step)
        source = slice(lines - stop, lines - start) if 1 in axes else slice(start, stop)
        flipped[:, start:stop] = images[:, source].flip(axes) if axes else images[:, source]
    return flipped

#: Below this the narrower of ``|cos|``, ``|sin|`` is treated as 0 (the weight
#: it would carry is under ``1e-30``), so ``1 / narrow`` never overflows.
_NARROW_FLOOR = 1e-30

#: Angles ``t`` and ``180 - t`` are paired (one set of weights serves both)
#: when their cosines are opposite and their sines equal to within this.
_PAIR_TOLERANCE = 1e-15


def _mirror_pairs(cos: np.ndarray, sin: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Indices ``(first, second)`` of disjoint angle pairs with ``(cos, sin)`` of
    the second equal to ``(-cos, sin)`` of the first (``t`` and ``180 - t``)."""
    close = (np.abs(cos[:, None] + cos[None, :]) <= _PAIR_TOLERANCE) & (
        np.abs(sin[:, None] - sin[None, :]) <= _PAIR_TOLERANCE
    )
    np.fill_diagonal(close, False)
    first, second, used = [], [], np.zeros(cos.size, dtype=bool)
    for a, b in zip(*np.nonzero(close)):
        if a < b and not used[a] and not used[b]:
            used[a] = used[b] = True
            first.append(a)
            second.append(b)
    return np.array(first, dtype=np.int64), np.array(second, dtype=np.int64)


class _Group:
    """Angles sharing a loop order, with their geometry tables (float64 masters).

    ``outer``/``inner`` name the image axis of the block's rows and of its
    contiguous inner loop: the inner axis is the one along which the detector
    position changes fastest (so consecutive pixels seldom share a bin and the
    scatter does not stall on repeated indices). The group's work rows start
    at ``first``; when ``paired``, the rows ``first + count ...`` hold the
    angles ``180 - t`` of the group's angles ``t``, in the same order.
    """

    def __init__(
        self,
        first: int,
        outer_fraction: np.ndarray,
        outer_whole: np.ndarray,
        inner_fraction: np.ndarray,
        inner_whole: np.ndarray,
        constants: np.ndarray,
        transposed: bool,
        paired: bool,
    ):
        self.first = first
        self.count = outer_fraction.shape[0]
        self.transposed = transposed
        self.paired = paired
        self.tables = [
            TransferCache(torch.from_numpy(np.ascontiguousarray(a)))
            for a in (outer_fraction, outer_whole, inner_fraction, inner_whole)
        ]
        self.constants = TransferCache(torch.from_numpy(np.ascontiguousarray(constants)))


class FootprintKernel:
    """Forward and adjoint of the pixel-footprint projector without storing it.

    Parameters
    ----------
    shape : tuple of int
        ``(H, W)`` of the images.
    angles : numpy.ndarray
        Angles in degrees (validated by the caller).
    n_detectors : int
        Number of detector bins.
    weight_cache_bytes : int, optional
        Memory allowed for keeping computed weights between products (all
        precisions together); 0 recomputes them every product.

    Notes
    -----
    Geometry and weights are those of :class:`~pnpguard.ParallelProjection`:
    the pixel centred at detector position ``s`` (in bins) touches the bins
    ``n - 1, n, n + 1`` with ``n = round(s)`` and ``f = s - n`` in
    ``[-1/2, 1/2]``, with weights ``F(-1/2 - f)``, ``1 - F(-1/2 - f) -
    F(-1/2 + f)`` and ``F(-1/2 + f)``, where ``F`` is the distribution
    function of the pixel's trapezoidal profile at ``t <= 0``,

    .. math::

        F(t) = \\frac{n}{2 w}\\,\\mathrm{clamp}\\Big(\\frac{t + o}{n}, 0, 1\\Big)^2
             + \\max\\Big(\\frac{t + i}{w}, 0\\Big),

    ``w = max(|cos|, |sin|)``, ``n = min(|cos|, |sin|)``, ``o = (w + n)/2``,
    ``i = (w - n)/2`` (the quadratic ramp up to ``-i``, then the linear part).
    The position is split as ``s = u_j + v_i`` (column and row terms), each
    term stored as its nearest integer plus a fraction in ``[-1/2, 1/2]``, so
    ``f`` is computed from small numbers and keeps the input precision's
    relative accuracy at any detector size. All weights are >= 0: the clamps
    keep the outer two nonnegative and they sum to at most ``1/2`` (``F`` is
    convex on ``t <= 0``), leaving the middle one >= ``1/2`` up to rounding.

    Work saved by symmetry (the products are unchanged): the pixel at
    ``(-x, -y)`` sits at ``2 c - s`` (``c`` the detector centre), so one set
    of weights serves both pixels with the outer weights swapped; and the
    angle ``180 - t`` sees the pixel at ``(x, y)`` where ``t`` sees
    ``(-x, y)``, so paired angles (found to within 1e-15 in cosine and sine)
    share their weights too. Each block thus computes the weights of a
    quarter of its pairs or, without paired angles, of half.
    """

    def __init__(
        self,
        shape: tuple[int, int],
        angles: np.ndarray,
        n_detectors: int,
        weight_cache_bytes: int = WEIGHT_CACHE_BYTES,
    ):
        self.shape = shape
        self.weight_cache_bytes = weight_cache_bytes
        #: Kept blocks with their weights per (dtype, device, block size): a list per group.
        self._kept: dict[tuple[torch.dtype, torch.device, int], list[list[tuple]]] = {}
        self.n_angles = angles.size
        self.n_detectors = n_detectors
        height, width = shape
        theta = np.deg2rad(angles)
        cos, sin = np.cos(theta), np.sin(theta)
        wide = np.maximum(np.abs(cos), np.abs(sin))
        narrow = np.minimum(np.abs(cos), np.abs(sin))
        narrow = np.where(narrow < _NARROW_FLOOR, 0.0, narrow)
        # Detector positions in bins: s = u[angle, column] + v[angle, row].
        u = (np.arange(width) - 0.5 * (width - 1))[None, :] * cos[:, None] + 0.5 * (n_detectors - 1)
        v = (0.5 * (height - 1) - np.arange(height))[None, :] * sin[:, None]
        u_whole, v_whole = np.rint(u), np.rint(v)
        lowest = int((u_whole.min(axis=1) + v_whole.min(axis=1)).min())
        highest = int((u_whole.max(axis=1) + v_whole.max(axis=1)).max())
        # Work sinogram rows: bins padded so that every reached bin (nearest +-1,
        # one more for the shifted views and one for a rounding tie of a
        # mirrored pixel) has a slot; cropped at the end.
        self.pad = max(0, 3 - lowest)
        self.stride = self.pad + max(n_detectors, highest + 4)
        with np.errstate(divide="ignore", invalid="ignore"):
            inverse_narrow = np.where(narrow > 0, 1.0 / np.where(narrow > 0, narrow, 1.0), 0.0)
        constants = np.stack(
            [
                0.5 * (wide + narrow - 1.0) * inverse_narrow,  # (o - 1/2) / n
                inverse_narrow,  # 1 / n
                0.5 * (wide - narrow - 1.0) / wide,  # (i - 1/2) / w
                1.0 / wide,  # 1 / w
                narrow / (2.0 * wide),  # n / (2 w)
            ],
            axis=1,
        )[:, :, None, None]
        # Loop order per angle: inner axis = columns when |cos| >= |sin|.
        by_columns = np.abs(cos) >= np.abs(sin)
        # The angle 180 - t sees the pixel at (x, y) where t sees (-x, y), so
        # paired angles share their weights (computed once for t).
        first_of_pair, second_of_pair = _mirror_pairs(cos, sin)
        single = np.setdiff1d(np.arange(angles.size), np.concatenate([first_of_pair, second_of_pair]))
        self.groups = []
        order: list[int] = []
        for columns in (True, False):
            for paired in (True, False):
                chosen = first_of_pair if paired else single
                chosen = chosen[by_columns[chosen] == columns]
                if chosen.size == 0:
                    continue
                row_terms = (v[chosen] - v_whole[chosen], v_whole[chosen])
                column_terms = (u[chosen] - u_whole[chosen], u_whole[chosen])
                outer, inner = (row_terms, column_terms) if columns else (column_terms, row_terms)
                self.groups.append(
                    _Group(
                        len(order), outer[0], outer[1], inner[0], inner[1], constants[chosen],
                        not columns, paired,
                    )
                )
                order.extend(chosen)
                if paired:
                    order.extend(second_of_pair[np.isin(first_of_pair, chosen)])
        # Pairs whose weights a product computes (each group's angles on the first half of its
        # lines) and those of them whose point reflection is another pixel (a mirrored index each).
        self._weighted_pairs = self._mirrored_pairs = 0
        for group in self.groups:
            lines, length = (width, height) if group.transposed else (height, width)
            self._weighted_pairs += group.count * ((lines + 1) // 2) * length
            self._mirrored_pairs += group.count * (lines // 2) * length
        self.order = np.array(order, dtype=np.int64)
        self.inverse_order = torch.from_numpy(np.argsort(self.order))
        self.order_tensor = torch.from_numpy(self.order)

    # ------------------------------------------------------------------ blocks
    def _blocks(self, group: _Group):
        """Blocks ``(angles, lines, mirrored)`` of about BLOCK_PAIRS pairs covering the group.

        Only the first half of the lines is visited: line ``l`` also stands
        for its point reflection through the image centre, line ``L - 1 - l``
        read backwards, for the first ``mirrored`` lines of the block.
        """
        lines, length = (self.shape[1], self.shape[0]) if group.transposed else self.shape
        half = (lines + 1) // 2
        pairs = _block_pairs()
        if half * length <= pairs:
            angle_step, line_step = max(1, pairs // (half * length)), half
        else:
            # Equal blocks of lines, each at most `pairs` (one line if longer).
            pieces = -(-half * length // pairs)
            angle_step, line_step = 1, max(1, min(pairs // length, -(-half // pieces)))
        for a in range(0, group.count, angle_step):
            for start in range(0, half, line_step):
                stop = min(half, start + line_step)
                mirrored = max(0, min(stop, lines // 2) - start)
                yield slice(a, min(group.count, a + angle_step)), slice(start, stop), mirrored

    def _weights(
        self, group: _Group, angles: slice, lines: slice, like: torch.Tensor, work: list[torch.Tensor]
    ) -> tuple[torch.Tensor, ...]:
        """Slot index (int64 and int32) and the three weights of a block, in ``like``'s dtype.

        All five are shaped ``(angles, lines, inner)``; the index counts slots
        from the block's first work row, minus one (the lowest bin's slot).
        The scatter of the forward map needs int64 indices; the gather of the
        adjoint reads int32 ones, a third faster in float64 (half the index
        traffic).
        """
        outer_fraction, outer_whole, inner_fraction, inner_whole = (
            t.like_real(like) for t in group.tables
        )
        rise, slope, level, gain, square = group.constants.like_real(like)[angles].unbind(1)
        shape = (angles.stop - angles.start, lines.stop - lines.start, inner_fraction.shape[1])
        size = shape[0] * shape[1] * shape[2]
        frac, near, ramp, low, high, scaled, index32, index = (w[:size].view(shape) for w in work[:8])
        torch.add(
            outer_fraction[angles, lines].unsqueeze(2), inner_fraction[angles].unsqueeze(1), out=frac
        )
        # Nearest whole bin of the fraction sum f (in [-1, 1]): floor(f + 1/2),
        # as the truncation of the positive f + 3/2 minus 1 (torch's round and
        # floor open a parallel region even on small tensors).
        index32.copy_(torch.add(frac, 1.5, out=near))
        near.copy_(index32).sub_(1.0)
        frac.sub_(near)
        rows = torch.arange(shape[0], dtype=like.dtype, device=like.device)
        inner_whole = inner_whole[angles] + (rows * self.stride + (self.pad - 1)).unsqueeze(1)
        near.add_(outer_whole[angles, lines].unsqueeze(2)).add_(inner_whole.unsqueeze(1))
        index32.copy_(near)
        index.copy_(index32)
        # Quadratic parts: clamp((o - 1/2 -+ f) / n, 0, 1)^2 * n / (2 w).
        torch.mul(frac, slope, out=scaled)
        torch.sub(rise, scaled, out=ramp).clamp_(0.0, 1.0)
        torch.mul(ramp, square, out=near)
        torch.sub(level, torch.mul(frac, gain, out=low), out=low).clamp_(min=0.0).addcmul_(ramp, near)
        torch.add(rise, scaled, out=ramp).clamp_(0.0, 1.0)
        torch.mul(ramp, square, out=near)
        torch.mul(frac, gain, out=high).add_(level).clamp_(min=0.0).addcmul_(ramp, near)
        middle = torch.add(low, high, out=near).neg_().add_(1.0)
        return index, index32, low, middle, high

    def _kept_bytes(self, dtype: torch.dtype) -> int:
        """Bytes that keeping every block's weights in ``dtype`` takes.

        Per weighted pair an int64 and an int32 index and three weights, and
        per mirrored pair the two indices of the reflected pixel.
        """
        weights = 3 * torch.empty((), dtype=dtype).element_size()
        return self._weighted_pairs * (12 + weights) + self._mirrored_pairs * 12

    def _weighted_blocks(self, like: torch.Tensor, work: list[torch.Tensor]):
        """Each group with an iterator over its blocks ``(angles, lines, mirrored, weights)``.

        ``weights`` is ``(index, index32, reflected, reflected32, low, middle,
        high)``: those of :meth:`_weights` with the reflected pixels' indices
        of :meth:`_mirrored_index` (None when the block mirrors no line). They
        are the kept ones when this precision and device has them; otherwise
        they are computed into ``work`` and, when :attr:`weight_cache_bytes`
        allows, copied and kept once the whole product has gone through them.
        Each block must be used before the next one is drawn.
        """
        # The block size is part of the key: it sets the blocks and the work buffers.
        key = (like.dtype, like.device, _block_pairs())
        kept = self._kept.get(key)
        fresh: list[list[tuple]] | None = None
        if kept is None:
            used = sum(self._kept_bytes(dtype) for dtype, _, _ in self._kept)
            if used + self._kept_bytes(like.dtype) <= self.weight_cache_bytes:
                fresh = []
        for number, group in enumerate(self.groups):
            if kept is not None:
                yield group, iter(kept[number])
            else:
                into = None
                if fresh is not None:
                    into = []
                    fresh.append(into)
                yield group, self._computed_blocks(group, like, work, into)
        if fresh is not None:
            self._kept[key] = fresh

    def _computed_blocks(
        self, group: _Group, like: torch.Tensor, work: list[torch.Tensor], into: list | None
    ):
        """The group's blocks with freshly computed weights (copies appended to ``into`` if given)."""
        for angles, lines, mirrored in self._blocks(group):
            index, index32, *values = self._weights(group, angles, lines, like, work)
            reflected = self._mirrored_index(index, index32, mirrored, work) if mirrored else (None, None)
            weights = (index, index32, *reflected, *values)
            if into is not None:
                weights = tuple(None if t is None else t.clone() for t in weights)
                into.append((angles, lines, mirrored, weights))
            yield angles, lines, mirrored, weights

    def _mirrored_index(
        self, index: torch.Tensor, index32: torch.Tensor, mirrored: int, work: list[torch.Tensor]
    ) -> tuple[torch.Tensor, torch.Tensor]:
        """Slot index (int64, int32) of the reflected pixels: bin ``n`` becomes ``D - 1 - n``.

        A reflected pixel sits at ``2 c - s`` with ``c = (D - 1)/2``, so its
        fraction is ``-f`` (the low and high weights swap, the middle one
        stays) and its nearest bin ``D - 1 - n``; at a rounding tie the other
        choice of nearest bin gives the same weights per bin.
        """
        rows = index.shape[0]
        shape = (rows, mirrored, index.shape[2])
        size = shape[0] * shape[1] * shape[2]
        return (
            torch.sub(work[8][:rows].view(rows, 1, 1), index[:, :mirrored], out=work[9][:size].view(shape)),
            torch.sub(work[11][:rows].view(rows, 1, 1), index32[:, :mirrored], out=work[12][:size].view(shape)),
        )

    def _work(self, like: torch.Tensor) -> list[torch.Tensor]:
        """Work buffers of one product, reused by every block (in ``like``'s dtype and device)."""
        size = min(_block_pairs() + max(self.shape), self.n_angles * self.shape[0] * self.shape[1])
        device = like.device
        floats = [torch.empty(size, dtype=like.dtype, device=device) for _ in range(6)]
        # Reflection offsets per work row: 2 (row * stride + pad - 1) + D - 1.
        rows = torch.arange(self.n_angles, dtype=torch.int64, device=device)
        offsets = 2 * (rows * self.stride + self.pad - 1) + self.n_detectors - 1
        return floats + [
            torch.empty(size, dtype=torch.int32, device=device),
            torch.empty(size, dtype=torch.int64, device=device),
            offsets,
            torch.empty(size, dtype=torch.int64, device=device),
            torch.empty(size, dtype=like.dtype, device=device),
            offsets.to(torch.int32),
            torch.empty(size, dtype=torch.int32, device=device),
        ]

    # ------------------------------------------------------------- transforms
    @staticmethod
    def _variants(group: _Group) -> list[tuple[int, tuple[int, ...], bool]]:
        """What each set of weights of a block serves: ``(row offset, flipped axes, mirrored)``.

        In the group's loop order ``(lines, inner)``: the pixels themselves;
        their point reflections (both axes flipped, mirrored index); and for
        paired angles the partner rows, which see the image flipped along x,
        directly and point-reflected (then flipped along y).
        """
        x_axis = 1 if group.transposed else 2
        y_axis = 3 - x_axis
        variants = [(0, (), False), (0, (1, 2), True)]
        if group.paired:
            variants += [(group.count, (x_axis,), False), (group.count, (y_axis,), True)]
        return variants

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """Sinograms ``(..., n_angles, n_detectors)`` of images ``(..., H, W)``."""
        lead = x.shape[:-2]
        images = x.reshape(-1, *self.shape)
        count = images.shape[0]
        slots = torch.zeros(count, self.n_angles * self.stride, dtype=x.dtype, device=x.device)
        work = self._work(x)
        product = work[2]
        for group, blocks in self._weighted_blocks(x, work):
            ordered = images.transpose(1, 2) if group.transposed else images
            variants = [
                (offset * self.stride, _flipped(ordered, axes), mirrored)
                for offset, axes, mirrored in self._variants(group)
            ]
            for angles, lines, mirrored, (index, _, reflected, _, low, middle, high) in blocks:
                base = (group.first + angles.start) * self.stride
                span = (angles.stop - angles.start) * self.stride - 2
                for offset, pixels, flipped in variants:
                    if flipped and not mirrored:
                        continue
                    where = reflected if flipped else index
                    rows = where.shape[1]
                    chosen = slice(lines.start, lines.start + rows)
                    weights = (high, middle, low) if flipped else (low, middle, high)
                    values = product[: where.numel()].view(where.shape)
                    flat = where.reshape(-1)
                    for n in range(count):
                        row = slots[n]
                        for shift, weight in enumerate(weights):
                            torch.mul(weight[:, :rows], pixels[n, chosen], out=values)
                            target = row.narrow(0, base + offset + shift, span)
                            target.scatter_add_(0, flat, values.view(-1))
        sinograms = slots.view(count, self.n_angles, self.stride)[
            :, self.inverse_order.to(x.device), self.pad : self.pad + self.n_detectors
        ]
        return sinograms.reshape(*lead, self.n_angles, self.n_detectors)

    def adjoint(self, y: torch.Tensor) -> torch.Tensor:
        """Backprojections ``(..., H, W)`` of sinograms ``(..., n_angles, n_detectors)``."""
        lead = y.shape[:-2]
        sinograms = y.reshape(-1, self.n_angles, self.n_detectors)
        count = sinograms.shape[0]
        slots = y.new_zeros(count, self.n_angles, self.stride)
        slots[:, :, self.pad : self.pad + self.n_detectors] = sinograms[:, self.order_tensor.to(y.device)]
        slots = slots.view(count, -1)
        height, width = self.shape
        images = y.new_zeros(count, height, width)
        work = self._work(y)
        gathered, accumulated = work[2], work[10]
        for group, blocks in self._weighted_blocks(y, work):
            lines, length = (width, height) if group.transposed else (height, width)
            variants = [
                (offset * self.stride, axes, y.new_zeros(count, lines, length), mirrored)
                for offset, axes, mirrored in self._variants(group)
            ]
            for angles, block_lines, mirrored, (_, index, _, reflected, low, middle, high) in blocks:
                base = (group.first + angles.start) * self.stride
                span = (angles.stop - angles.start) * self.stride - 2
                for offset, _, into, flipped in variants:
                    if flipped and not mirrored:
                        continue
                    where = reflected if flipped else index
                    rows = where.shape[1]
                    chosen = slice(block_lines.start, block_lines.start + rows)
                    weights = (high, middle, low) if flipped else (low, middle, high)
                    flat = where.reshape(-1)
                    values = gathered[: flat.numel()]
                    term = values.view(where.shape)
                    total = accumulated[: flat.numel()].view(where.shape)
                    for n in range(count):
                        row = slots[n]
                        for shift, weight in enumerate(weights):
                            source = row.narrow(0, base + offset + shift, span)
                            torch.index_select(source, 0, flat, out=values)
                            if shift == 0:
                                torch.mul(term, weight[:, :rows], out=total)
                            else:
                                total.addcmul_(term, weight[:, :rows])
                        into[n, chosen] += total.sum(0)
            target = sum(_flipped(into, axes) for _, axes, into, _ in variants)
            images += target.transpose(1, 2) if group.transposed else target
        return images.reshape(*lead, height, width)
