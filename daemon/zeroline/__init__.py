"""zeroline: drift and baseline correction for field data loggers.

Corrected readings are advisory. They must not drive life-safety gas alarms, interlocks
or regulatory compliance reports; the raw reading is always kept and published beside them.
"""

import os

# The model's matrices are tiny (p ≤ ~12): a multi-threaded BLAS only adds hand-over costs,
# measured at up to 10× slower on a loaded 2-core gateway. Set before numpy loads; an
# explicit setting in the environment wins.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

__version__ = "0.1.0"
