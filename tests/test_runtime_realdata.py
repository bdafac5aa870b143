"""The whole runtime (framer + decoder + estimator + alarms through the station tasks) over the real
captures in ../shared/data/real, intact and damaged: no crash, counters that add up."""

from __future__ import annotations

import random
from pathlib import Path

import pytest

from ionwarden.daemon.config import load_settings
from ionwarden.daemon.ingest import FileSource
from ionwarden.daemon.runtime import StationConfig, StationState, run_virtual
from ionwarden.daemon.runtime._app import make_factory
from ionwarden.daemon.runtime._supervisor import Daemon, DaemonOptions

CAPTURES = [
    "rtcm/RTK134_202102051543.rtcm3",
    "rtcm/pygnssutils_pygpsdata-rtcm3.log",
    "rtcm/pyrtcm_pygpsdata-MIXED-RTCM3BADCRC.log",
    "nmea/pygnssutils_pygpsdata-rtcm3_nmea-extract.nmea",
]


def _replay(path: Path) -> dict[str, object]:
    settings = load_settings(stations=[{"name": "real", "source": f"file://{path}?speed=0"}])
    cfg = StationConfig(name="real", source=FileSource(path=str(path), speed=0))

    async def main() -> dict[str, object]:
        daemon = Daemon(
            DaemonOptions(stations=(cfg,), summary_interval_s=0), factory=make_factory(settings)
        )
        assert await daemon.run() == 0
        st = daemon.stopped_statistics["real"]
        return {
            "state": st.state,
            "bytes": st.bytes_total,
            "decoder": st.decoder,
            "epochs": st.epochs_total,
        }

    return run_virtual(main())


@pytest.mark.parametrize("name", CAPTURES)
def test_runtime_replays_real_capture_to_the_end(real_data: Path, name: str) -> None:
    """The runtime reads a real capture (named) to its end: every byte counted, frames decoded."""
    path = real_data / name
    out = _replay(path)
    assert out["state"] is StationState.FINISHED
    assert out["bytes"] == path.stat().st_size
    assert out["decoder"].frames_total > 0  # type: ignore[attr-defined]


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_runtime_survives_a_damaged_real_capture(
    real_data: Path, tmp_path: Path, seed: int
) -> None:
    """The runtime reads RTK134_202102051543.rtcm3 with random byte flips and cuts without crashing."""
    data = bytearray((real_data / "rtcm/RTK134_202102051543.rtcm3").read_bytes()[:300_000])
    rng = random.Random(seed)  # common practice: seeded mutation
    for _ in range(300):
        data[rng.randrange(len(data))] = rng.randrange(256)
    for _ in range(20):  # cut out random spans (drops mid-frame)
        a = rng.randrange(len(data))
        del data[a : a + rng.randrange(1, 400)]
    path = tmp_path / "damaged.rtcm3"
    path.write_bytes(bytes(data))
    out = _replay(path)
    assert out["state"] is StationState.FINISHED
    dec = out["decoder"]
    assert dec.crc_errors_total > 0
    assert dec.frames_total > 0
