"""What the DSP loop hands the writer thread (:meth:`spinflip.daemon.storage.writer.ScanStore.put`):
a :class:`~spinflip.daemon.products.row.Row`, or one of these records."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from spinflip.daemon.products.row import Row
from spinflip.daemon.rfi.interference import RfiRecord  # made where it is decided

if TYPE_CHECKING:
    from spinflip.daemon.calibration.tsys_meter import TsysMeasurement

__all__ = ["CloseScan", "Item", "Note", "OpenScan", "RfiRecord", "Row", "TsysRecord",
           "item_bytes"]


@dataclass(frozen=True)
class OpenScan:
    """A scan file begins: its name (the writer adds -1, -2 ... if taken) and FITS header."""

    name: str
    header: dict


@dataclass(frozen=True)
class CloseScan:
    """The open scan file ends."""


@dataclass(frozen=True, eq=False)
class TsysRecord:
    """One system-temperature measurement (a row of the TSYS HISTORY table)."""

    date_obs: str
    tsys_k: float
    tsys_sig_k: float
    tsys_ref_k: float
    tcal_k: float
    on_off: float
    channels_used: float
    status: str                      # "ok" or why not (at most 60 characters)
    tsys_chan_k: np.ndarray | None   # float[nchan], or None (the measurement failed)

    @classmethod
    def of(cls, meas: TsysMeasurement, date_obs: str) -> TsysRecord:
        """The record of a :class:`spinflip.daemon.calibration.tsys_meter.TsysMeasurement`."""
        nan = float("nan")
        return cls(date_obs, meas.tsys_k, meas.tsys_phase_k.get("sig", nan),
                   meas.tsys_phase_k.get("ref", nan), meas.tcal_k, meas.on_off,
                   meas.channels_used, "ok" if meas.ok else meas.message[:60], meas.tsys_chan_k)

    @property
    def nbytes(self) -> int:
        return int(getattr(self.tsys_chan_k, "nbytes", 0))


@dataclass(frozen=True)
class Note:
    """An observer's note or a recorded event (a HISTORY card)."""

    date_obs: str
    text: str


#: Every item the writer takes.
Item = Row | OpenScan | CloseScan | TsysRecord | RfiRecord | Note


def item_bytes(item: Item) -> int:
    """Memory an item holds (its arrays), bytes; records of scalars count as 0."""
    return item.nbytes if isinstance(item, (Row, TsysRecord)) else 0
