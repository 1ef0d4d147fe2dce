"""The BCG vaccine trials: a published meta-analysis worked example.

Data: 13 trials of the BCG vaccine against tuberculosis, Colditz et al. (1994), JAMA 271:698,
table 1, as tabulated and analysed in Viechtbauer (2010), "Conducting meta-analyses in R with
the metafor package", Journal of Statistical Software 36(3), section 3 (the BCG example).
Counts, absolute latitudes and years are from memory; they reproduce the published Q statistic
to the printed 4 decimals (152.2330), which checks the memory.

Per trial: vaccinated (tpos, tneg) and unvaccinated (cpos, cneg) with / without tuberculosis.
Effect: log risk ratio, y = log(tpos/(tpos+tneg)) - log(cpos/(cpos+cneg)); sampling variance
v = 1/tpos - 1/(tpos+tneg) + 1/cpos - 1/(cpos+cneg) (the large-sample variance of a log risk
ratio; Viechtbauer 2010, sec. 3.1).

The published results below are the printed output of the paper's BCG examples (rounded to
4 decimals; from memory).
"""

from __future__ import annotations

import numpy as np

TPOS = np.array([4, 6, 3, 62, 33, 180, 8, 505, 29, 17, 186, 5, 27], dtype=np.float64)
TNEG = np.array([119, 300, 228, 13536, 5036, 1361, 2537, 87886, 7470, 1699, 50448, 2493, 16886], dtype=np.float64)
CPOS = np.array([11, 29, 11, 248, 47, 372, 10, 499, 45, 65, 141, 3, 29], dtype=np.float64)
CNEG = np.array([128, 274, 209, 12619, 5761, 1079, 619, 87892, 7232, 1600, 27197, 2338, 17825], dtype=np.float64)
ABLAT = np.array([44, 55, 42, 52, 13, 44, 19, 13, 27, 42, 18, 33, 33], dtype=np.float64)
YEAR = np.array([1948, 1949, 1960, 1977, 1973, 1953, 1973, 1980, 1968, 1961, 1974, 1969, 1976], dtype=np.float64)

#: Log risk ratios and their sampling variances.
EFFECT = np.log(TPOS / (TPOS + TNEG)) - np.log(CPOS / (CPOS + CNEG))
VARIANCE = 1 / TPOS - 1 / (TPOS + TNEG) + 1 / CPOS - 1 / (CPOS + CNEG)

#: Random-effects model, REML: tau^2, estimate, its standard error (z-based, tau^2 taken as known).
REML_TAU2 = 0.3132
REML_ESTIMATE = -0.7145
REML_SE = 0.1798
#: Cochran's Q of the fixed-effect model on 12 degrees of freedom.
Q_STATISTIC = 152.2330
#: DerSimonian-Laird tau^2 (rma(..., method = "DL")).
DL_TAU2 = 0.3088
#: Mixed-effects meta-regression on absolute latitude, REML: residual tau^2, intercept, slope.
REML_ABLAT_TAU2 = 0.0763
REML_ABLAT_COEF = (0.2515, -0.0291)
#: Meta-regression on absolute latitude and year, REML: residual tau^2.
REML_ABLAT_YEAR_TAU2 = 0.1108
#: Printed precision of every published number above.
PRINTED = 5e-5
