"""Waveform transfer speed: the oscilloscope driver against a raw socket read of the same block.

Starts a simulated bench in a child process (so the instrument does not share this
process's interpreter lock, as a real instrument would not) on 127.0.0.1, acquires a 100k-point record once, then times
(best of ``--repeat``) three ways of reading channel 1 as float32 samples, a payload in
which newline bytes are common:

* raw: a plain socket, connected once like the driver's session, sends ``TRAC? 1`` and
  reads the header then exactly the byte count;
* driver: ``Oscilloscope.fetch_waveform(1)`` (preamble query, block read with the read
  termination cleared, decoding and scaling);
* naive: pyvisa ``query_binary_values`` with the read termination left at ``\\n``.

Prints the ratios driver/raw and naive/raw measured in this one run. The design goal is
driver/raw within 2.

    python benchmarks/waveform_transfer.py [--points 100000] [--repeat 5]
"""

from __future__ import annotations

import argparse
import socket
import time


def _raw_read(sock: socket.socket, command: bytes) -> bytes:
    """Send ``command`` on an open socket and read its block: header, then exactly the count."""
    if True:
        sock.sendall(command)
        buf = bytearray()
        while len(buf) < 2:
            buf += sock.recv(65536)
        n = int(buf[1:2])
        while len(buf) < 2 + n:
            buf += sock.recv(65536)
        total = 2 + n + int(buf[2:2 + n]) + 1
        view = bytearray(total)
        view[: len(buf)] = buf
        got = len(buf)
        mv = memoryview(view)
        while got < total:
            got += sock.recv_into(mv[got:], total - got)
        return bytes(view[2 + n: total - 1])


def _serve(conn) -> None:
    """Child process: run a simulated bench until told to stop."""
    from benchctl.simulated_instruments.bench import SimulatedBench

    bench = SimulatedBench("flyback-48v-5v", time_scale=50.0).start()
    try:
        conn.send((bench.servers["scope"].port, bench.resources["scope"]))
        conn.recv()
    finally:
        bench.stop()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=100_000)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args(argv)

    import multiprocessing

    from benchctl.drivers.oscilloscope import Oscilloscope

    parent, child = multiprocessing.Pipe()
    proc = multiprocessing.Process(target=_serve, args=(child,), daemon=True)
    proc.start()
    try:
        port, resource = parent.recv()
        scope = Oscilloscope(resource, timeout_s=30.0).open()
        scope.set_record(args.points * 1e-9, args.points)
        scope.set_data_format("float32")
        scope.single(30.0)
        scope.fetch_waveform(1)  # the record is synthesised on the first read; time the transfers only
        raw = socket.create_connection(("127.0.0.1", port))
        raw.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        payload = _raw_read(raw, b"TRAC? 1\n")
        newlines = payload.count(b"\n")

        def best(fn) -> float:
            times = []
            for _ in range(args.repeat):
                t0 = time.perf_counter()
                fn()
                times.append(time.perf_counter() - t0)
            return min(times)

        t_raw = best(lambda: _raw_read(raw, b"TRAC? 1\n"))
        t_drv = best(lambda: scope.fetch_waveform(1))
        session = scope.session.visa_resource  # the naive path on the driver's own pyvisa resource, for comparison only
        t_naive = best(lambda: session.query_binary_values("TRAC? 1", datatype="f", is_big_endian=True))
        scope.close()
        raw.close()
    finally:
        parent.send("stop")
        proc.join(10.0)
    print(f"{args.points} float32 samples, {len(payload)} bytes, {newlines} newline bytes in the payload")
    print(f"raw socket   {t_raw * 1e3:8.2f} ms")
    print(f"driver       {t_drv * 1e3:8.2f} ms   driver/raw = {t_drv / t_raw:.2f}  (goal <= 2)")
    print(f"naive pyvisa {t_naive * 1e3:8.2f} ms   naive/raw  = {t_naive / t_raw:.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
