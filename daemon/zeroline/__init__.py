"""zeroline: drift and baseline correction for field data loggers.

Corrected readings are advisory. They must not drive life-safety gas alarms, interlocks
or regulatory compliance reports; the raw reading is always kept and published beside them.
"""

__version__ = "0.1.0"
