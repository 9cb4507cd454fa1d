"""Neurodata Without Borders test files, written by pynwb (the format's
reference library), and what an import must make of them, computed with
numpy (`numpy.histogram` over the bin edges, `numpy.interp` of the
position), for `replay-tool import` (PROTOCOL.md §5).

    python make_nwb.py OUT_DIR

Writes into OUT_DIR:
  reach.nwb              6 units, a gzip-chunked position SpatialSeries
                         "hand" (irregular timestamps, conversion 0.01) and
                         a second one "marker" (regular, starting_time and
                         rate), a trials table with target_x, target_y
  reach_counts.npy       (T, 6) counts of 20 ms bins from the first to the
                         last "hand" timestamp
  reach_kinematics.npy   (T, 4) pos_x, pos_y at bin centres and vel_x,
                         vel_y over each bin, from "hand" x conversion
  reach_trials.npy       (K, 4) start_bin, end_bin, target_x, target_y
  window_counts.npy      the same counts for --start 1.0 --stop 5.0
  window_kinematics.npy  and kinematics
  no_units.nwb           the same session without a units table
  index_past.nwb         spike_times_index runs past spike_times
  backwards.nwb          "hand" timestamps that go backwards
  unsorted.nwb           a unit whose spike times go backwards
  long.nwb               3 units of about 12 000 spikes each and 24 000
                         position samples (gzip-chunked position), so
                         an import reads every dataset in several windows
                         and writes its bins in several chunks
  long_counts.npy        its (T, 3) counts of 20 ms bins
  long_kinematics.npy    and (T, 4) kinematics
The data are synthetic and seeded.
"""

import os
import shutil
import sys
from datetime import datetime, timezone

import h5py
import numpy as np
from hdmf.backends.hdf5.h5_utils import H5DataIO
from pynwb import NWBHDF5IO, NWBFile
from pynwb.behavior import Position, SpatialSeries

BIN_S = 0.020


def session(with_units=True):
    rng = np.random.default_rng(2026)
    nwb = NWBFile(
        session_description="synthetic centre-out reaching, seeded",
        identifier="synthetic-reach-1",
        session_start_time=datetime(2026, 1, 5, 9, 0, tzinfo=timezone.utc),
    )
    if with_units:
        for u in range(6):
            n = int(rng.integers(40, 400))
            st = np.sort(rng.uniform(-0.5, 8.5, size=n))
            nwb.add_unit(spike_times=st)
    t = 0.25 + np.cumsum(rng.uniform(0.006, 0.014, size=700))
    hand = np.column_stack([np.sin(1.3 * t), np.cos(0.7 * t)]) * 800.0
    beh = nwb.create_processing_module("behavior", "behaviour")
    pos = Position(name="Position")
    pos.add_spatial_series(
        SpatialSeries(
            name="hand",
            data=H5DataIO(hand, compression="gzip", chunks=(64, 2)),
            timestamps=t,
            reference_frame="screen centre",
            conversion=0.01,
            unit="m",
        )
    )
    pos.add_spatial_series(
        SpatialSeries(
            name="marker",
            data=hand[::2] * 0.5,
            starting_time=0.3,
            rate=50.0,
            reference_frame="screen centre",
            unit="cm",
        )
    )
    beh.add(pos)
    nwb.add_trial_column("target_x", "target x, cm")
    nwb.add_trial_column("target_y", "target y, cm")
    for k in range(5):
        nwb.add_trial(
            start_time=0.4 + 1.5 * k,
            stop_time=1.37 + 1.5 * k,
            target_x=10.0 * np.cos(k),
            target_y=10.0 * np.sin(k),
        )
    return nwb, t, hand * 0.01


def expected(spikes, t, pos, start, stop):
    n_bins = int(np.floor((stop - start) / BIN_S))
    edges = start + np.arange(n_bins + 1) * BIN_S
    counts = np.column_stack(
        [np.histogram(s[s < edges[-1]], bins=edges)[0] for s in spikes]
    ).astype(np.uint16)
    centres = start + (np.arange(n_bins) + 0.5) * BIN_S
    cols = []
    for d in range(pos.shape[1]):
        cols.append(np.interp(centres, t, pos[:, d]))
    for d in range(pos.shape[1]):
        p = np.interp(edges, t, pos[:, d])
        cols.append((p[1:] - p[:-1]) / BIN_S)
    return counts, np.column_stack(cols), n_bins


def main(out):
    os.makedirs(out, exist_ok=True)
    nwb, t, pos = session()
    path = os.path.join(out, "reach.nwb")
    with NWBHDF5IO(path, "w") as io:
        io.write(nwb)
    with h5py.File(path) as f:
        flat = f["units/spike_times"][:]
        ends = f["units/spike_times_index"][:]
    starts = np.concatenate([[0], ends[:-1]])
    spikes = [flat[a:b] for a, b in zip(starts, ends)]
    counts, kin, n_bins = expected(spikes, t, pos, t[0], t[-1])
    np.save(os.path.join(out, "reach_counts.npy"), counts)
    np.save(os.path.join(out, "reach_kinematics.npy"), kin)
    trials = []
    for k in range(5):
        s, e = 0.4 + 1.5 * k, 1.37 + 1.5 * k
        trials.append(
            [
                np.floor((s - t[0]) / BIN_S),
                min(np.ceil((e - t[0]) / BIN_S), n_bins),
                10.0 * np.cos(k),
                10.0 * np.sin(k),
            ]
        )
    np.save(os.path.join(out, "reach_trials.npy"), np.array(trials))
    counts, kin, _ = expected(spikes, t, pos, 1.0, 5.0)
    np.save(os.path.join(out, "window_counts.npy"), counts)
    np.save(os.path.join(out, "window_kinematics.npy"), kin)

    nwb, _, _ = session(with_units=False)
    with NWBHDF5IO(os.path.join(out, "no_units.nwb"), "w") as io:
        io.write(nwb)
    shutil.copy(path, os.path.join(out, "index_past.nwb"))
    with h5py.File(os.path.join(out, "index_past.nwb"), "r+") as f:
        f["units/spike_times_index"][-1] = len(flat) + 5
    shutil.copy(path, os.path.join(out, "backwards.nwb"))
    with h5py.File(os.path.join(out, "backwards.nwb"), "r+") as f:
        ts = f["processing/behavior/Position/hand/timestamps"]
        ts[100] = ts[99] - 0.5
    shutil.copy(path, os.path.join(out, "unsorted.nwb"))
    # The third unit (row 2) has two spike times swapped.
    with h5py.File(os.path.join(out, "unsorted.nwb"), "r+") as f:
        st = f["units/spike_times"]
        a = int(f["units/spike_times_index"][1])
        st[a + 5], st[a + 6] = st[a + 6], st[a + 5]

    long_session(out)


def long_session(out):
    """Several windows of every dataset an import reads a window at a
    time: spike times beyond 4 096 per unit, position samples beyond
    4 096, bins beyond 4 096."""
    rng = np.random.default_rng(2027)
    nwb = NWBFile(
        session_description="synthetic long reaching session, seeded",
        identifier="synthetic-reach-long",
        session_start_time=datetime(2026, 1, 6, 9, 0, tzinfo=timezone.utc),
    )
    spikes = []
    for u in range(3):
        st = np.sort(rng.uniform(-1.0, 242.0, size=int(rng.integers(11000, 13000))))
        spikes.append(st)
    nwb.add_unit_column("quality", "a per-unit number, unused by import")
    for st in spikes:
        nwb.add_unit(spike_times=st, quality=1.0)
    t = 0.1 + np.cumsum(rng.uniform(0.006, 0.014, size=24000))
    hand = np.column_stack([np.sin(0.3 * t), np.cos(0.2 * t)]) * 50.0
    beh = nwb.create_processing_module("behavior", "behaviour")
    pos = Position(name="Position")
    pos.add_spatial_series(
        SpatialSeries(
            name="hand",
            data=H5DataIO(hand, compression="gzip", chunks=(1000, 2)),
            timestamps=H5DataIO(t, compression="gzip", chunks=(1000,)),
            reference_frame="screen centre",
            unit="cm",
        )
    )
    beh.add(pos)
    path = os.path.join(out, "long.nwb")
    with NWBHDF5IO(path, "w") as io:
        io.write(nwb)
    with h5py.File(path) as f:
        flat = f["units/spike_times"][:]
        ends = f["units/spike_times_index"][:]
    starts = np.concatenate([[0], ends[:-1]])
    spikes = [flat[a:b] for a, b in zip(starts, ends)]
    counts, kin, _ = expected(spikes, t, hand, t[0], t[-1])
    np.save(os.path.join(out, "long_counts.npy"), counts)
    np.save(os.path.join(out, "long_kinematics.npy"), kin)


if __name__ == "__main__":
    main(sys.argv[1])
