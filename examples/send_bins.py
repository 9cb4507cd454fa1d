#!/usr/bin/env python3
"""Stream a session directory to decoderd as a front end would.

Reads counts.npy (any little-endian integer dtype, C order) and manifest.toml
from a session directory and sends one NBIN datagram per bin (PROTOCOL.md §1)
at the bin rate, stamping origin_ns with CLOCK_MONOTONIC at the end of each
bin. Standard library only, so it runs on any rig computer with Python 3.11+.

    python3 examples/send_bins.py demo-output/later-block --daemon 127.0.0.1:27400
"""

import argparse
import ast
import socket
import struct
import sys
import time
import tomllib
from pathlib import Path

MAGIC = b"NBIN"
VERSION = 1
DTYPES = {"u1": "B", "i1": "b", "u2": "H", "i2": "h", "u4": "I", "i4": "i", "u8": "Q", "i8": "q"}


def read_counts(path: Path):
    """Returns (rows, columns, flat list of counts) from a .npy file."""
    data = path.read_bytes()
    if data[:6] != b"\x93NUMPY":
        sys.exit(f"{path}: not a .npy file")
    major = data[6]
    if major == 1:
        hlen = struct.unpack("<H", data[8:10])[0]
        start = 10
    else:
        hlen = struct.unpack("<I", data[8:12])[0]
        start = 12
    header = ast.literal_eval(data[start : start + hlen].decode("latin1"))
    descr, fortran, shape = header["descr"], header["fortran_order"], header["shape"]
    if fortran:
        sys.exit(f"{path}: Fortran order is not supported by this example; save with C order")
    if len(shape) != 2:
        sys.exit(f"{path}: counts must be 2-D (bins x channels), found shape {shape}")
    code = descr.lstrip("<|=")
    if descr.startswith(">") or code not in DTYPES:
        sys.exit(f"{path}: dtype {descr} is not a little-endian integer type")
    rows, cols = shape
    body = data[start + hlen :]
    fmt = "<" + DTYPES[code] * (rows * cols)
    values = struct.unpack_from(fmt, body)
    if any(v < 0 or v > 65535 for v in values):
        sys.exit(f"{path}: counts must lie in 0..65535 to fit the u16 packet field")
    return rows, cols, values


def main():
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("session", type=Path, help="session directory (manifest.toml, counts.npy)")
    p.add_argument("--daemon", default="127.0.0.1:27400", help="decoderd's listen address (network.listen)")
    p.add_argument(
        "--time-scale", type=float, default=1.0, help="time between bins in bin widths (1 = the bin rate, 0.5 = twice as fast)"
    )
    p.add_argument("--start-seq", type=int, default=0, help="seq of the first bin")
    p.add_argument("--limit", type=int, default=0, help="send at most this many bins (0 = all)")
    args = p.parse_args()

    manifest = tomllib.loads((args.session / "manifest.toml").read_text())
    bin_ms = float(manifest["bin_ms"])
    rows, cols, values = read_counts(args.session / "counts.npy")
    host, port = args.daemon.rsplit(":", 1)
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    dest = (host, int(port))
    bin_us = round(bin_ms * 1000)
    if not args.time_scale > 0:
        sys.exit(f"--time-scale {args.time_scale}: must be above 0")
    period_ns = int(bin_ms * 1e6 * args.time_scale)
    n = rows if args.limit <= 0 else min(rows, args.limit)
    row_fmt = "<" + "H" * cols
    t0 = time.monotonic_ns()
    for i in range(n):
        due = t0 + (i + 1) * period_ns  # the end of bin i
        while True:
            now = time.monotonic_ns()
            if now >= due:
                break
            time.sleep(min((due - now) / 1e9, 0.002))
        header = MAGIC + struct.pack("<HHQQII", VERSION, cols, args.start_seq + i, time.monotonic_ns(), bin_us, 0)
        sock.sendto(header + struct.pack(row_fmt, *values[i * cols : (i + 1) * cols]), dest)
    print(f"sent {n} bins of {cols} channels at {bin_ms} ms to {args.daemon}", file=sys.stderr)


if __name__ == "__main__":
    main()
