"""Conversions between decibels and linear values: the one place they happen.

>>> round(db_to_gain(-6.0), 6)
0.501187
>>> round(gain_to_db(0.5), 4)
-6.0206
>>> round(power_to_db(0.5), 4)
-3.0103
"""

from __future__ import annotations

import numpy as np

__all__ = ["db_to_gain", "gain_to_db", "db_to_power", "power_to_db", "TINY"]

#: Floor used when converting zero to decibels (-600 dB re 1), so logs stay finite.
TINY = 1e-30


def db_to_gain(gain_db):
    """Amplitude factor for a level in dB: ``10 ** (gain_db / 20)``."""
    return np.power(10.0, np.asarray(gain_db, dtype=float) / 20.0) if np.ndim(gain_db) else 10.0 ** (float(gain_db) / 20.0)


def gain_to_db(gain):
    """Level in dB of an amplitude factor: ``20 * log10(|gain|)``, floored at -600 dB."""
    if np.ndim(gain):
        return 20.0 * np.log10(np.maximum(np.abs(np.asarray(gain, dtype=float)), TINY))
    return 20.0 * float(np.log10(max(abs(float(gain)), TINY)))


def db_to_power(level_db):
    """Power (energy) ratio for a level in dB: ``10 ** (level_db / 10)``."""
    return np.power(10.0, np.asarray(level_db, dtype=float) / 10.0) if np.ndim(level_db) else 10.0 ** (float(level_db) / 10.0)


def power_to_db(power):
    """Level in dB of a power (energy) ratio: ``10 * log10(power)``, floored at -300 dB."""
    if np.ndim(power):
        return 10.0 * np.log10(np.maximum(np.asarray(power, dtype=float), TINY))
    return 10.0 * float(np.log10(max(float(power), TINY)))
