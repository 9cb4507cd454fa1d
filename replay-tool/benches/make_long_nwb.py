"""A long Neurodata Without Borders recording for the import benchmark
(BENCHMARKS.md, "Import in bounded memory"), written by pynwb: 192 units
firing at about 20 Hz each (Poisson), a 100 Hz hand position, one trial
every 4 s. Synthetic and seeded.

    python make_long_nwb.py OUT.nwb MINUTES
"""

import sys
from datetime import datetime, timezone

import numpy as np
from hdmf.backends.hdf5.h5_utils import H5DataIO
from pynwb import NWBHDF5IO, NWBFile
from pynwb.behavior import Position, SpatialSeries


def main(out, minutes):
    seconds = 60.0 * minutes
    rng = np.random.default_rng(31)
    nwb = NWBFile(
        session_description="synthetic long reaching session for the import benchmark",
        identifier=f"synthetic-long-{minutes}",
        session_start_time=datetime(2026, 2, 2, 9, 0, tzinfo=timezone.utc),
    )
    for _ in range(192):
        rate = rng.uniform(5.0, 35.0)
        n = rng.poisson(rate * seconds)
        nwb.add_unit(spike_times=np.sort(rng.uniform(0.0, seconds, size=n)))
    t = np.arange(0.0, seconds, 0.01)
    hand = np.column_stack([np.sin(0.4 * t), np.cos(0.3 * t)]) * 8.0
    beh = nwb.create_processing_module("behavior", "behaviour")
    pos = Position(name="Position")
    pos.add_spatial_series(
        SpatialSeries(
            name="hand",
            data=H5DataIO(hand, compression="gzip", chunks=(4096, 2)),
            timestamps=H5DataIO(t, compression="gzip", chunks=(4096,)),
            reference_frame="screen centre",
            unit="cm",
        )
    )
    beh.add(pos)
    for k in range(int(seconds // 4)):
        nwb.add_trial(start_time=4.0 * k, stop_time=4.0 * k + 3.5)
    with NWBHDF5IO(out, "w") as io:
        io.write(nwb)


if __name__ == "__main__":
    main(sys.argv[1], float(sys.argv[2]))
