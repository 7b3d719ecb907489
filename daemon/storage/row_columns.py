"""Typed rows and records as the journal's and FITS file's columns
(:class:`spinflip.daemon.storage.archive.ScanWriter`): the one place that names them."""

from __future__ import annotations

from spinflip.daemon.products.row import Row
from spinflip.daemon.storage.items import Note, RfiRecord, TsysRecord


def row_columns(row: Row) -> dict:
    """The columns of one integration (``DATA``, ``FLAGGED``, the scalars of
    :data:`spinflip.daemon.storage.archive.ROW_SCALARS`, then the extra columns)."""
    pos = row.position
    out = {
        "DATA": row.data, "FLAGGED": row.flagged,
        "TSYS": row.tsys_k,
        "EXPOSURE": row.exposure_s,
        "DATE-OBS": row.date_obs,
        "CRVAL1": row.lo_hz, "CDELT1": row.channel_hz, "CRPIX1": row.crpix,
        "CTYPE1": "FREQ", "RESTFREQ": row.restfreq_hz, "VFRAME": row.vframe_m_s,
        "OBJECT": row.object,
        "GLON": pos.glon_deg, "GLAT": pos.glat_deg, "RA": pos.ra_deg, "DEC": pos.dec_deg,
        "AZIMUTH": pos.az_deg, "ELEVATIO": pos.el_deg,
    }
    if row.vel_crval_m_s is not None:
        out.update({"CRVAL1A": row.vel_crval_m_s, "CDELT1A": row.vel_cdelt_m_s,
                    "CRPIX1A": row.crpix})
    out.update({
        "TSYSAGE": row.tsys_age_s,
        "LOSTSAMP": int(row.lost_samples), "BLANKSMP": int(row.blanked_samples),
        "CALSTATE": int(row.cal_s > 0), "CALTIME": float(row.cal_s),
        "UNKNTIME": float(row.unknown_s), "FOLDED": int(row.folded),
    })
    if row.chan_exposure_s is not None:
        out["CHANEXP"] = row.chan_exposure_s
    out.update({
        "FLAGTIME": row.flag_time_fraction,
        "FLAGFREQ": row.flag_freq_fraction,
        "RFIFRAC": row.rfi_fraction,
        "UNCOVFR": row.uncovered_fraction,
        "SKFRAC": row.sk_fraction,
        "NIMPULSE": int(row.n_impulse), "NCARRIER": int(row.n_carrier),
        "PNTERR": row.pointing_error_deg,
    })
    return out


def tsys_columns(rec: TsysRecord) -> dict:
    """A TSYS HISTORY row (:data:`spinflip.daemon.storage.archive.TSYS_SCALARS`, ``TSYSCHAN``)."""
    return {"DATE-OBS": rec.date_obs, "TSYS": rec.tsys_k, "TSYSSIG": rec.tsys_sig_k,
            "TSYSREF": rec.tsys_ref_k, "TCAL": rec.tcal_k, "ONOFF": rec.on_off,
            "NCHANUSE": rec.channels_used, "STATUS": rec.status,
            "TSYSCHAN": rec.tsys_chan_k}


def rfi_columns(rec: RfiRecord) -> dict:
    """An interference log row (:data:`spinflip.daemon.storage.archive.RFI_SCALARS`)."""
    return {"KIND": rec.kind, "FREQ": rec.freq_hz, "VALUE": rec.value, "TEXT": rec.text,
            "DATE-OBS": rec.date_obs}


def note_columns(note: Note) -> dict:
    """An observer's note (``DATE-OBS``, ``TEXT``)."""
    return {"DATE-OBS": note.date_obs, "TEXT": note.text}
