"""treeflux.compiler: from kinetic schemes to closed-form steady states and compiled code.

>>> from treeflux.compiler import Scheme, compile_scheme
>>> s = Scheme()
>>> s.add_edge("E", "ES", "k1*S"); s.add_edge("ES", "E", "km1 + k2")
>>> m = compile_scheme(s, backend="python")
>>> m.steady_state({"k1": 1.0, "S": 2.0, "km1": 0.5, "k2": 1.5}).round(3).tolist()
[[0.5, 0.5]]

The public names are imported on first use (PEP 562), so the ``treeflux``
command starts without numpy and SymPy and can answer an interrupt during
start-up with one line.
"""

import importlib

__version__ = "0.1.0"

_EXPORTS = {"ModelError": ".errors", "TooLargeError": ".errors", "Scheme": ".model",
            "load": ".parse", "from_data": ".parse", "compile_scheme": ".pipeline"}

__all__ = ["Scheme", "load", "from_data", "compile_scheme", "ModelError", "TooLargeError", "__version__"]


def __getattr__(name):
    if name in _EXPORTS:
        value = getattr(importlib.import_module(_EXPORTS[name], __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_EXPORTS))
