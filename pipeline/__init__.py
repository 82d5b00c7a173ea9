"""patchbatch: batch analysis of whole-cell current-clamp step recordings.

Stages (one module or package each): ``readers`` -> ``steps`` -> ``fitters`` -> ``qc`` ->
``report``, run per cell by ``batch``. Units are SI inside the package (V, A, s, ohm, F);
injected current positive = depolarizing.
"""

__version__ = "0.1.0"
