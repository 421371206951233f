"""Trace ``bench/load.py``'s warm-up for two workers fed apart: where each probe went.

Session 27's ``livematch-1p`` (two workers, w1 fed the vehicles of w1's shards on
``fleetb/+/position``, w0 the others on ``fleet/+/position``) never finished the
warm-up: a few of the 16 probe vehicles got no answer, different ones each run. This
script starts the same set-up as ``load.run_step`` does (its broker settings, its
``daemon_config``, its ``warm_up`` and probe topics), with two witnesses the bench has
not: the broker's own log (``log_type all``: every PUBLISH it sends, to which client)
and a third subscriber on ``#`` (every fix routed and every answer published). After
the warm-up (``--timeout`` seconds at most) it reads each worker's ``/metrics``
(received, matched, kept for a takeover) and, for a group, every shard's lease in
Redis, and prints per probe: its shard, the topic it was fed on, the worker holding
its shard, how many of its fixes the broker sent to which worker, and how many answers
came back.

``--group`` runs the two as session 27's code did (Redis, worker group ``load``);
without it they are lone workers on the memory store (the fixed ``livematch-1p``).

    PYTHONPATH=$PWD .venv/bin/python bench/loadtrace.py --group
    PYTHONPATH=$PWD .venv/bin/python bench/loadtrace.py

The report lands in ``bench/results/loadtrace.<group|lone>.md`` (``--out``), with the
command, commit, time and 1-minute load average.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))
import load  # bench/ is no package: the folder is put on the path above

# what /metrics lines are kept: received, matched, kept for a takeover, rejected
METRICS = ("livematch_messages_received_total", "livematch_fixes_processed_total",
           "livematch_shard_buffered_total", "livematch_messages_rejected_total",
           "livematch_shards_held")


def start_broker(folder: Path) -> tuple[subprocess.Popen[bytes], int, Path]:
    """``load.start_mosquitto``'s broker, logging every packet to a file."""
    port = load.free_port()
    log = folder / "mosquitto.log"
    conf = folder / "mosquitto.conf"
    conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\n"
                    "max_queued_messages 1000000\nmax_inflight_messages 1000\n"
                    f"log_dest file {log}\nlog_type all\n"
                    f"user {os.environ.get('USER') or 'root'}\n", encoding="utf-8")
    exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    proc = subprocess.Popen([exe, "-c", str(conf)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    load.wait_port(port)
    return proc, port, log


def metrics(port: int) -> dict[str, float]:
    """The kept counters of one worker's /metrics page."""
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as page:
        text = page.read().decode()
    out = {}
    for line in text.splitlines():
        name, _, value = line.partition(" ")
        if name in METRICS:
            out[name.removeprefix("livematch_")] = float(value)
    return out


def lease_holders(rport: int) -> dict[int, str | None]:
    """Each shard's lease holder (worker name) in the bench's group, None when free."""
    from livematch.service.shards import shard_tag

    out: dict[int, str | None] = {}
    for s in range(load.GROUP_SHARDS):
        key = f"load:{{{shard_tag(s, load.GROUP_SHARDS)}}}:lease"
        value = subprocess.run(["redis-cli", "-p", str(rport), "--raw", "GET", key],
                               capture_output=True, text=True, check=False).stdout.strip()
        out[s] = value.split("-", 1)[0] if value else None  # "<worker>-<hex>:<fence>"
    return out


def trace(group: bool, timeout: float) -> dict[str, Any]:
    """Run the set-up once; what each probe and each worker did."""
    import numpy as np

    from livematch.service.shards import shard_of

    folder = Path(tempfile.mkdtemp(prefix="lm-trace-"))
    procs: list[subprocess.Popen[bytes]] = []
    split = frozenset(load.shards_held("w1", ["w0", "w1"], load.GROUP_SHARDS))
    try:
        broker, port, log = start_broker(folder)
        procs.append(broker)
        store, rport = "memory://", 0
        if group:
            redis, rport = load.start_redis(folder)
            procs.append(redis)
            store = f"redis://127.0.0.1:{rport}/0"
        mports: list[int] = []
        sut: list[subprocess.Popen[bytes]] = []
        for w in range(2):
            mports.append(load.free_port())
            cfg = load.daemon_config(folder, port, store, f"w{w}", "load" if group else "",
                                     load.SPLIT_TOPIC if w else load.IN_TOPIC, mports[-1])
            sut.append(subprocess.Popen([sys.executable, "-m", "livematch.cli", "run",
                                         "--config", str(cfg)], cwd=folder))
        procs.extend(sut)
        plain = load.paho_client
        load.paho_client = lambda name: plain("witness")  # a client id of its own
        try:
            witness = load.Subscriber(port, "#")
        finally:
            load.paho_client = plain
        sub = load.Subscriber(port, "livematch/match/#")
        load.wait_ready(mports, sut)
        make_pool = folder / "pool.npz"
        load.make_pool(make_pool)
        pool = dict(np.load(make_pool))
        try:
            outcome = f"finished in {load.warm_up(sub, pool, 0, timeout, split):.1f} s"
        except RuntimeError as exc:
            outcome = f"failed: {exc}"
        time.sleep(1.0)
        workers = {f"w{w}": metrics(mp) for w, mp in enumerate(mports)}
        holders = lease_holders(rport) if group else {}
        sub.close()
        witness.close()
    finally:
        for proc in reversed(procs):  # the workers first: their last checkpoint
            proc.terminate()
            try:
                proc.wait(20)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
    fed: dict[str, int] = {}
    answered: dict[str, int] = {}
    for _at, payload in witness.got:
        record = json.loads(payload)
        vehicle = str(record.get("vehicle", ""))
        if "accuracy" in record:  # a probe fix as published (outputs carry no accuracy)
            fed[vehicle] = fed.get(vehicle, 0) + 1
        else:
            answered[vehicle] = answered.get(vehicle, 0) + 1
    sent: dict[str, dict[str, int]] = {}
    for line in log.read_text(encoding="utf-8", errors="replace").splitlines():
        if "Sending PUBLISH to load-w" in line and "/position" in line:
            client = line.split("Sending PUBLISH to ", 1)[1].split()[0]
            vehicle = line.rsplit("'", 2)[-2].split("/")[1]
            sent.setdefault(vehicle, {}).setdefault(client, 0)
            sent[vehicle][client] += 1
    probes = []
    for p in range(load.PROBES):
        vehicle = f"probe{p}"
        shard = shard_of(vehicle, load.GROUP_SHARDS)
        probes.append({"probe": vehicle, "shard": shard,
                       "fed_on": load.feed_topic(vehicle, 0, split),
                       "fed_to": "w1" if shard in split else "w0",
                       "lease_holder": holders.get(shard), "fixes_published": fed.get(vehicle, 0),
                       "broker_sent": sent.get(vehicle, {}),
                       "outputs": answered.get(vehicle, 0)})
    return {"group": group, "warm_up": outcome, "workers": workers, "probes": probes,
            "fed_to_w1": sorted(split),
            "held_by_w1": sorted(s for s, h in holders.items() if h == "w1")}


def render(result: dict[str, Any], command: str) -> str:
    """The trace as Markdown."""
    state = load.git_state()
    lines = [f"# load.py warm-up traced: two workers fed apart, "
             f"{'as a worker group (session 27)' if result['group'] else 'lone'}", "",
             f"`{command}` at commit {state['commit']}, "
             f"{time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}, "
             f"load average (1 min) {load.load_average()}.", "",
             f"Warm-up: {result['warm_up']}.", "",
             "| probe | shard | fed on | fed to | lease holder | fixes published | "
             "broker sent (client: PUBLISHes) | outputs |",
             "|---|---:|---|---|---|---:|---|---:|"]
    for p in result["probes"]:
        sent = ", ".join(f"{c}: {n}" for c, n in sorted(p["broker_sent"].items()))
        lines.append(f"| {p['probe']} | {p['shard']} | `{p['fed_on']}` | {p['fed_to']} | "
                     f"{p['lease_holder'] or '—'} | {p['fixes_published']} | {sent} | "
                     f"{p['outputs']} |")
    lines += ["", "| worker | " + " | ".join(METRICS) + " |",
              "|---|" + "---:|" * len(METRICS)]
    for w, values in result["workers"].items():
        lines.append(f"| {w} | " + " | ".join(
            f"{values.get(m.removeprefix('livematch_'), 0):g}" for m in METRICS) + " |")
    if result["group"]:
        fed, held = set(result["fed_to_w1"]), set(result["held_by_w1"])
        lines += ["", f"Shards fed to w1 whose lease w0 holds: {sorted(fed - held)}; "
                  f"fed to w0 whose lease w1 holds: {sorted(held - fed)}."]
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    ap.add_argument("--group", action="store_true",
                    help="run the two workers as a worker group on Redis (session 27's)")
    ap.add_argument("--timeout", type=float, default=30.0, help="warm-up limit, seconds")
    ap.add_argument("--out", default=str(load.ROOT / "bench" / "results"))
    args = ap.parse_args(argv)
    result = trace(args.group, args.timeout)
    command = "bench/loadtrace.py" + (" --group" if args.group else "") + (
        f" --timeout {args.timeout:g}" if args.timeout != 30.0 else "")
    text = render(result, command)
    stem = Path(args.out) / f"loadtrace.{'group' if args.group else 'lone'}"
    stem.with_suffix(".json").write_text(json.dumps(result, indent=1) + "\n", encoding="utf-8")
    stem.with_suffix(".md").write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
