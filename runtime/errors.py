"""Error types shared by the runtime and the compiler."""


class TreefluxError(Exception):
    """Base class: a refusal with a clear one-line message."""


class EvaluationError(TreefluxError, ValueError):
    """Bad evaluation input: wrong shape, unknown name, non-positive or
    non-finite rate, or a scheme with several steady states."""
