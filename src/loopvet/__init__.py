"""loopvet: batch checks of feedback-loop records.

Conventions used throughout the package
---------------------------------------
* Polynomial coefficient arrays are stored in **ascending** order: ``c[..., k]`` is the
  coefficient of ``s**k`` (or ``z**k``). This is numpy.polynomial's order, not np.polyval's.
  Conversion to descending order happens only at the boundary with scipy.signal (tests).
* Every numeric array carries a **leading sample axis**: a batch of polynomials has shape
  ``(samples, degree + 1)``; one nominal loop is ``samples == 1``.
* Zero leading coefficients are never trimmed silently; a drop of degree is reported.
* Units: seconds, rad/s, degrees, plain gain ratios unless a key says ``_db``/``_pct``.
"""

__version__ = "0.1.0"
