"""Checks a session exported by `replay-tool export LOG --out DIR --nwb
FILE [--metadata M]` with the format's reference library and its
inspector (PROTOCOL.md §5):

  - pynwb opens and reads the file with every warning turned into an error;
  - every array equals the export folder's, element by element (exact:
    the same numbers written twice);
  - row times are the bins' ends, one bin apart;
  - with --metadata, the NWB inspector reports nothing of importance
    CRITICAL or above, and nothing but the findings PROTOCOL.md explains.

    python check_nwb_export.py FILE.nwb DIR [--with-metadata]

Exits 1 with the first difference.
"""

import sys
import tomllib
import warnings

import numpy as np

# The findings PROTOCOL.md §5 explains, by check and object.
EXPLAINED = {
    ("check_regular_timestamps", "/acquisition/binned_counts"),
    ("check_regular_timestamps", "/acquisition/binned_features"),
    ("check_processing_module_name", None),
}


def fail(msg):
    print(f"check_nwb_export: {msg}")
    sys.exit(1)


def same(name, got, want):
    got, want = np.asarray(got), np.asarray(want)
    if got.shape != want.shape:
        fail(f"{name}: shape {got.shape}, export folder {want.shape}")
    if not np.array_equal(got, want):
        i = np.argwhere(got != want)[0]
        fail(f"{name}: element {tuple(i)} is {got[tuple(i)]}, export folder {want[tuple(i)]}")


def main(path, folder, with_metadata):
    warnings.simplefilter("error")
    from pynwb import NWBHDF5IO

    import os

    # Counts, or features (a session decoded from continuous features).
    features = os.path.exists(f"{folder}/features.npy")
    series = "binned_features" if features else "binned_counts"
    values = np.load(f"{folder}/{'features' if features else 'counts'}.npy")
    # A log without task packets has no kinematics or trials.
    has_task = os.path.exists(f"{folder}/kinematics.npy")
    with NWBHDF5IO(path, "r") as io:
        nwb = io.read()
        c = nwb.acquisition[series]
        same(f"acquisition/{series}", c.data[:], values)
        ts = c.timestamps[:]
        with open(f"{folder}/manifest.toml", "rb") as m:
            bin_s = tomllib.load(m)["bin_ms"] / 1000.0
        if not np.allclose(np.diff(ts), bin_s, rtol=0, atol=1e-9):
            fail(f"{series} timestamps are not one bin apart")
        dec = nwb.processing["decoder"]
        same("estimate", dec["estimate"].data[:], np.load(f"{folder}/estimates.npy"))
        same("command", dec["command"].data[:], np.load(f"{folder}/commands.npy"))
        same("valid", dec["valid"].data[:].astype(bool), np.load(f"{folder}/valid.npy"))
        for s in [dec["estimate"], dec["state"]]:
            if abs(s.starting_time - ts[0]) > 1e-12 or abs(s.rate - 1.0 / bin_s) > 1e-9:
                fail(f"{s.name}: starting_time/rate do not give the {series} timestamps")
        if has_task:
            kin = np.load(f"{folder}/kinematics.npy")
            d = kin.shape[1] // 2
            beh = nwb.processing["behavior"]
            same("cursor", beh["Position"]["cursor"].data[:], kin[:, :d])
            same("cursor_velocity", beh["CursorVelocity"]["cursor_velocity"].data[:], kin[:, d:])
            cursor = beh["Position"]["cursor"]
            if abs(cursor.starting_time - ts[0]) > 1e-12 or abs(cursor.rate - 1.0 / bin_s) > 1e-9:
                fail(f"cursor: starting_time/rate do not give the {series} timestamps")
            trials = np.genfromtxt(f"{folder}/trials.csv", delimiter=",", names=True)
            tr = nwb.trials.to_dataframe()
            same("trial ids", tr.index.to_numpy(), trials["trial"].astype(np.int64))
            start_of_bin0 = ts[0] - bin_s
            np.testing.assert_allclose(
                tr["start_time"], start_of_bin0 + trials["start_bin"] * bin_s, rtol=0, atol=1e-9
            )
            np.testing.assert_allclose(
                tr["stop_time"], start_of_bin0 + trials["end_bin"] * bin_s, rtol=0, atol=1e-9
            )
            same("target_x", tr["target_x"].to_numpy(), trials["target_x"])
            same("target_y", tr["target_y"].to_numpy(), trials["target_y"])
        if with_metadata and nwb.subject is None:
            fail("--metadata gave a subject, the file has none")
    print(f"pynwb read {path} with no warnings; every array equals {folder}")

    if with_metadata:
        warnings.simplefilter("default")
        from nwbinspector import Importance, inspect_nwbfile

        found = list(inspect_nwbfile(nwbfile_path=path))
        for m in found:
            print(f"  inspector: {m.importance.name} {m.check_function_name} {m.location}: {m.message[:120]}")
        critical = [m for m in found if m.importance.value >= Importance.CRITICAL.value]
        if critical:
            fail(f"the NWB inspector found {len(critical)} CRITICAL finding(s)")
        unexplained = [
            m
            for m in found
            if (m.check_function_name, m.location) not in EXPLAINED
        ]
        if unexplained:
            m = unexplained[0]
            fail(f"a finding PROTOCOL.md does not explain: {m.check_function_name} at {m.location}")
        print(f"NWB inspector: nothing CRITICAL; {len(found)} finding(s), each explained")


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], "--with-metadata" in sys.argv[3:])
