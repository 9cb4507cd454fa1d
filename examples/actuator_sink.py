#!/usr/bin/env python3
"""A minimal actuator client: receive decoderd's velocity packets and print them.

Binds the actuator address, parses each NVEL datagram (PROTOCOL.md §2) and
prints seq, state, flags, click probability, command and estimate; on
Ctrl-C prints how many
packets came in each state. Standard library only. A real actuator client
follows `command` (never `estimate`) and stops when packets stop coming.

    python3 examples/actuator_sink.py --listen 127.0.0.1:27401
"""

import argparse
import socket
import struct
import sys

STATES = {0: "disarmed", 1: "armed", 2: "coasting", 3: "halted"}
FLAGS = {1: "missing", 2: "speed-clamped", 4: "accel-clamped", 8: "model-changed", 16: "click"}


def parse(data: bytes):
    if len(data) < 48 or data[:4] != b"NVEL":
        raise ValueError("not a velocity packet")
    version, state, dims = struct.unpack_from("<HBB", data, 4)
    if version not in (1, 2) or not 1 <= dims <= 8 or len(data) != 48 + 16 * dims:
        raise ValueError(f"bad header: version {version}, dims {dims}, {len(data)} bytes")
    seq, origin_ns, recv_ns, sent_ns, flags = struct.unpack_from("<QQQQI", data, 8)
    # Version 2 carries the click probability where version 1 reserved 0.
    (click_prob,) = struct.unpack_from("<f", data, 44) if version == 2 else (0.0,)
    values = struct.unpack_from("<" + "d" * (2 * dims), data, 48)
    return {
        "seq": seq, "state": STATES.get(state, str(state)), "flags": flags,
        "click_prob": click_prob,
        "origin_ns": origin_ns, "recv_ns": recv_ns, "sent_ns": sent_ns,
        "command": values[:dims], "estimate": values[dims:],
    }


def main():
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--listen", default="127.0.0.1:27401")
    p.add_argument("--quiet", action="store_true", help="print only the summary")
    args = p.parse_args()
    host, port = args.listen.rsplit(":", 1)
    sock = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    sock.bind((host, int(port)))
    counts = {}
    try:
        while True:
            data, _ = sock.recvfrom(65536)
            try:
                pkt = parse(data)
            except ValueError as e:
                print(f"ignored datagram: {e}", file=sys.stderr)
                continue
            counts[pkt["state"]] = counts.get(pkt["state"], 0) + 1
            if not args.quiet:
                flags = ",".join(n for b, n in FLAGS.items() if pkt["flags"] & b) or "-"
                cmd = " ".join(f"{v:+8.3f}" for v in pkt["command"])
                est = " ".join(f"{v:+8.3f}" for v in pkt["estimate"])
                print(f"seq {pkt['seq']:>8}  {pkt['state']:<8}  {flags:<20}  click {pkt['click_prob']:.2f}  command {cmd}  estimate {est}")
    except KeyboardInterrupt:
        pass
    print("packets by state:", counts, file=sys.stderr)


if __name__ == "__main__":
    main()
