"""treeflux.compiler: from kinetic schemes to closed-form steady states and compiled code.

>>> from treeflux.compiler import Scheme, compile_scheme
>>> s = Scheme()
>>> s.add_edge("E", "ES", "k1*S"); s.add_edge("ES", "E", "km1 + k2")
>>> m = compile_scheme(s, backend="python")
>>> m.steady_state({"k1": 1.0, "S": 2.0, "km1": 0.5, "k2": 1.5}).round(3).tolist()
[[0.5, 0.5]]
"""

__version__ = "0.1.0"

from .errors import ModelError, TooLargeError  # noqa: E402
from .model import Scheme  # noqa: E402
from .parse import from_data, load  # noqa: E402
from .pipeline import compile_scheme  # noqa: E402

__all__ = ["Scheme", "load", "from_data", "compile_scheme", "ModelError", "TooLargeError", "__version__"]
