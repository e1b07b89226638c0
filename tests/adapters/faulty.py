"""A test adapter with a known quadratic cost that misbehaves on purpose (argv[1] says how).

J(x) = 1/2 sum_i (x_i - c_i)^2 / s_i^2 with c_i = i + 1 and s_i = 1 + i/2, i = 0..3.

Modes: ok, crash_once STATE_FILE, crash_always, segfault, hang, garbage, wrong_version, wrong_length,
wrong_id, stray_stdout, deaf, errors (a recoverable error where x_0 < -100, a fatal one where x_0 > 1000,
a NaN cost where 100 < x_0 <= 1000), slow_start, ignore_term (ignores SIGTERM, then hangs in its first
evaluation), huge_dim N (a hello declaring dimension N, written as given, e.g. 1e12), close_stdout
(closes its stdout in its first evaluation and keeps running), close_stdout_exit (closes its stdout in
its first evaluation, then exits with status 4), chatty MIB (writes MIB MiB of numbered 100-byte lines
to stderr in its first evaluation, and nothing else), counting DIR (appends a line to DIR/<its pid>.count
at each evaluation).

Arguments after the mode that no mode reads (e.g. a unique marker for finding the process in /proc) are
ignored.
"""
import json
import os
import signal
import sys
import time

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "adapters", "python"))
import varpost_adapter as va  # noqa: E402

DIM = 4
C = [i + 1.0 for i in range(DIM)]
S = [1.0 + i / 2.0 for i in range(DIM)]
mode = sys.argv[1] if len(sys.argv) > 1 else "ok"
raw_out = sys.stdout.buffer
calls = [0]


def quadratic(x):
    g = [(xi - ci) / (si * si) for xi, ci, si in zip(x, C, S)]
    j = 0.5 * sum((xi - ci) ** 2 / (si * si) for xi, ci, si in zip(x, C, S))
    return j, g


def cost_grad(x):
    calls[0] += 1
    if mode == "crash_once" and calls[0] == 2 and not os.path.exists(sys.argv[2]):
        open(sys.argv[2], "w").close()
        print("simulated crash in the model", file=sys.stderr, flush=True)
        os._exit(7)
    if mode == "crash_always":
        print("fatal: the model ran out of memory", file=sys.stderr, flush=True)
        os._exit(3)
    if mode == "segfault":
        print("about to fault", file=sys.stderr, flush=True)
        os.kill(os.getpid(), signal.SIGSEGV)
    if mode in ("hang", "ignore_term"):
        print("waiting forever", file=sys.stderr, flush=True)
        time.sleep(3600)
    if mode in ("close_stdout", "close_stdout_exit"):
        print("closing stdout", file=sys.stderr, flush=True)
        os.close(1)
        time.sleep(0.2 if mode == "close_stdout_exit" else 3600)
        os._exit(4)
    if mode == "counting":
        with open(os.path.join(sys.argv[2], "%d.count" % os.getpid()), "a") as f:
            f.write("%r\n" % (x,))
    if mode == "chatty" and calls[0] == 1:
        err = sys.stderr.buffer
        for k in range(int(sys.argv[2]) * 1024 * 1024 // 100):
            err.write(b"chatty line %08d " % k + b"." * 78 + b"\n")
        err.flush()
    if mode == "garbage":
        raw_out.write(b"Iteration 1: residual 0.5\n")
        raw_out.flush()
        time.sleep(3600)
    if mode == "wrong_id":
        j, g = quadratic(x)
        raw_out.write((json.dumps({"id": 999, "cost": j, "grad": g}) + "\n").encode())
        raw_out.flush()
        time.sleep(3600)
    if mode == "errors":
        if x[0] < -100:
            raise va.Recoverable("the model blew up at step 12")
        if x[0] > 1000:
            raise RuntimeError("the observation file is missing")
        if x[0] > 100:
            return float("nan"), [0.0] * DIM
    j, g = quadratic(x)
    if mode == "wrong_length":
        g = g[:-1]
    return j, g


if mode == "wrong_version":
    raw_out.write(b'{"hello":"varpost-adapter","protocol":99,"dim":4}\n')
    raw_out.flush()
    sys.stdin.readline()
    sys.exit(0)
if mode == "huge_dim":
    raw_out.write(b'{"hello":"varpost-adapter","protocol":1,"dim":%s}\n' % sys.argv[2].encode())
    raw_out.flush()
    sys.stdin.readline()
    sys.exit(0)
if mode == "deaf":
    # Declares a large state, then never reads a request: varpost's write must not block past its timeout.
    raw_out.write(b'{"hello":"varpost-adapter","protocol":1,"dim":3000000,"encodings":["binary"]}\n')
    raw_out.flush()
    sys.stdin.readline()
    print("not reading any more", file=sys.stderr, flush=True)
    time.sleep(3600)
if mode == "stray_stdout":
    raw_out.write(b"Loading model fields...\n")
    raw_out.flush()
if mode == "ignore_term":
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
if mode == "slow_start":
    time.sleep(3600)

va.serve(DIM, cost_grad, label="faulty test adapter (%s)" % mode)
