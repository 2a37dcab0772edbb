"""The caution printed wherever reconstructions could inform decisions about people."""

CAUTION = (
    "Caution: a convergence guarantee is not a correctness guarantee; learned priors can "
    "hallucinate structure that is not in the object; any clinical use follows local "
    "regulations and licensed practice."
)
