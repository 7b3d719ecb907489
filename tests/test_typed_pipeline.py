"""The pipeline's value types: the channel grid, the typed row and its columns, the writer's
typed items, and the source capabilities (issue 13). Fast unit checks, no daemon run."""

from __future__ import annotations

import numpy as np
import pytest

from spinflip.daemon import config
from spinflip.daemon.dsp.channel_grid import ChannelGrid
from spinflip.daemon.products.row import Row
from spinflip.daemon.rfi.carriers import lo_channels
from spinflip.daemon.rfi.masks import dc_channels, named_channels
from spinflip.daemon.sky.coordinates import SkyPosition
from spinflip.daemon.sky.hi_line import HI_REST_FREQ_HZ
from spinflip.daemon.sources.base import Source
from spinflip.daemon.storage import columns, journal
from spinflip.daemon.storage.items import CloseScan, OpenScan, item_bytes
from spinflip.daemon.storage.row_columns import row_columns
from spinflip.daemon.storage.writer import ScanStore


def test_channel_grid_places_the_lo_in_channel_n_over_2():
    grid = ChannelGrid(256, 2.4e6 / 256)
    lo = 1420.0e6
    f = grid.sky_hz(lo)
    assert grid.lo_index == 128 and f[128] == lo
    assert grid.crpix == 129.0                       # FITS pixels count from 1
    assert np.allclose(np.diff(f), 2.4e6 / 256) and grid.sample_rate_hz == pytest.approx(2.4e6)
    assert grid.sky_hz(lo, [0, 255]).tolist() == [f[0], f[255]]
    # HI at its rest frequency is at radio velocity 0 in the channel that holds it
    k = int(np.argmin(np.abs(grid.sky_hz(HI_REST_FREQ_HZ) - HI_REST_FREQ_HZ)))
    assert abs(grid.radio_velocity_km_s(HI_REST_FREQ_HZ)[k]) < 1e-9


def test_dc_flagging_has_one_owner():
    grid = ChannelGrid(64, 1e4)
    assert np.flatnonzero(dc_channels(64)).tolist() == [grid.lo_index]
    assert not dc_channels(64, flag_dc=False).any()
    assert np.array_equal(named_channels(1.42e9, 64, 1e4, True) & dc_channels(64), dc_channels(64))
    assert np.flatnonzero(lo_channels(64)).tolist() == [31, 32, 33]


def _row(nchan: int = 16) -> Row:
    return Row(data=np.arange(nchan, dtype=np.float32), flagged=np.zeros(nchan, bool),
               date_obs="2026-03-01T04:00:00.000", exposure_s=5.0, tsys_k=90.0, lo_hz=1.42e9,
               channel_hz=1e4, crpix=nchan // 2 + 1.0, vframe_m_s=-1.2e4, object="G030.0+00.0",
               position=SkyPosition(30.0, 0.0, 281.7, -2.6, 170.0, 40.0),
               chan_exposure_s=np.full(nchan, 5.0, np.float32), vel_crval_m_s=1.0e4,
               vel_cdelt_m_s=-2.1e3, cal_s=0.5, folded=True, n_carrier=2)


def test_a_row_becomes_every_column_of_the_file_contract():
    cols = row_columns(_row())
    assert set(columns.REQUIRED_ROW_KEYS) <= set(cols)
    assert {"CRVAL1A", "CDELT1A", "CRPIX1A", "TSYSAGE", "LOSTSAMP", "BLANKSMP", "CALSTATE",
            "CALTIME", "UNKNTIME", "FOLDED", "CHANEXP", "FLAGTIME", "FLAGFREQ", "RFIFRAC",
            "UNCOVFR", "SKFRAC", "NIMPULSE", "NCARRIER"} <= set(cols)
    assert cols["ELEVATIO"] == 40.0 and cols["AZIMUTH"] == 170.0 and cols["GLON"] == 30.0
    assert cols["CALSTATE"] == 1 and cols["FOLDED"] == 1 and cols["CRPIX1A"] == cols["CRPIX1"]
    journal._row_record(cols, 16)          # the journal accepts it as it is


def test_the_writer_takes_typed_items_only(tmp_path):
    store = ScanStore(tmp_path, 16, None, lambda sev, text: None, hold_bytes=1_000_000)
    with pytest.raises(TypeError, match="not a writer item"):
        store.put({"DATA": np.zeros(16)})
    with pytest.raises(TypeError):
        store.put(("open", "scan-x", {}))
    store.put(OpenScan("scan-x", {"TELESCOP": "HRFS-3", "BUNIT": "K"}))
    store.put(CloseScan())
    assert item_bytes(_row()) == 16 * 4 + 16 + 16 * 4 and item_bytes(CloseScan()) == 0


@pytest.mark.parametrize("kind", ["sim", "rtlsdr", "replay"])
def test_every_source_states_its_capabilities(tmp_path, kind):
    cfg = config.load(None)
    over = {"source": {"kind": kind}}
    if kind == "replay":
        path = tmp_path / "x.cu8"
        path.write_bytes(bytes(2 * 4 * 1024 * 8))
        over["source"]["path"] = str(path)
    config.merge(cfg, over)
    from spinflip.daemon.sources.base import make_source
    src = make_source(cfg, fast=True)
    assert isinstance(src, Source)
    assert src.can_fire_noise_source() == (kind != "replay")
    assert src.can_reopen() == (kind == "rtlsdr")
    src.set_pointing(None)                 # accepted by every source
