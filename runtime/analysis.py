"""Analysis of compiled schemes: response curves, thermodynamics, passage
times, sampling of parameter space and fitting.

Public functions (each also a ``treeflux`` subcommand):

- :func:`response_curve` — dose-response of one observable to one input
  (EC10/50/90, effective Hill coefficient, steepest slopes, Hill fit);
- :func:`thermodynamics` — net fluxes, cycle affinities, entropy production,
  numeric detailed-balance check;
- :func:`mean_first_passage` — mean first-passage time to a set of states;
- :func:`absorption_probabilities` — splitting probabilities into target
  sets or terminal components;
- :func:`sample` — log-uniform sampling of parameter space, evaluated in
  this process, a process pool or on a dask cluster (:func:`write_table`);
- :func:`fit` — least-squares fit of bounded parameters to measured
  observables (:func:`read_table`).

Every number is a prediction of the model, not a measurement. The runtime
uses numpy (scipy only inside :func:`fit`) and never the compiler.
"""

from .fitting import fit, read_table
from .passage import absorption, absorption_probabilities, mean_first_passage, passage_times
from .response import response_curve, response_summaries
from .sampling import DEFAULT_DECADES, sample, sample_ranges, write_table
from .thermo import fundamental_cycles, thermodynamics

__all__ = [
    "response_curve", "response_summaries", "thermodynamics", "fundamental_cycles",
    "mean_first_passage", "passage_times", "absorption_probabilities", "absorption",
    "sample", "sample_ranges", "write_table",
    "DEFAULT_DECADES", "fit", "read_table",
]
