"""Error types. Every refusal carries a one-line message naming what is wrong."""

from treeflux.runtime.errors import TreefluxError


class ModelError(TreefluxError, ValueError):
    """A scheme or model file is malformed: the message names file, edge or symbol."""


class TooLargeError(TreefluxError, ValueError):
    """A requested method would exhaust memory or time; the message gives the
    estimate and the method that would work."""
