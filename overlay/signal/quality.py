"""Which points of a scan are not used, and why: non-finite data, a low return signal, a low SNR."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from overlay.io.bundle import Scan
    from overlay.settings import Site


def quality_checks(scan: "Scan", finite: np.ndarray, snr: np.ndarray, site: "Site") -> list[tuple[np.ndarray, str]]:
    """(mask of failing points, reason) per quality rule, in the order reasons are given."""
    checks = [(~finite, "non-finite data")]
    if scan.signal_level is not None and site.quality.min_signal_level > 0:
        checks.append((np.nan_to_num(scan.signal_level, nan=0.0) < site.quality.min_signal_level, "low signal"))
    if site.quality.min_snr_db is not None:
        checks.append((~(snr >= site.quality.min_snr_db), "low SNR"))
    return checks
