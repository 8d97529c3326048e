"""Published reference data shared by several test files (test-only; not part of the package).

Import with ``from _reference import SCHOOLS_Y, SCHOOLS_SD``: pytest puts ``tests/`` on
``sys.path`` because ``tests/conftest.py`` sits in a directory without ``__init__.py``.
"""

import numpy as np

__all__ = ["SCHOOLS_Y", "SCHOOLS_SD"]

#: Eight schools: estimated coaching effects on SAT-V scores (points) in schools A-H and their
#: standard errors. Source: Rubin (1981), "Estimation in parallel randomized experiments",
#: Journal of Educational Statistics 6(4), 377-401; tabulated in Gelman et al., Bayesian Data
#: Analysis, 3rd ed. (BDA3), section 5.5, Table 5.2.
SCHOOLS_Y = np.array([28.0, 8, -3, 7, -1, 1, 18, 12])
SCHOOLS_SD = np.array([15.0, 10, 16, 11, 9, 11, 10, 18])
