"""Robustness survey: run dihedra as a careless user would and count how it ends (not a test).

Every case is one command run in a fresh process, in a folder of its own that holds copies of
the inputs it needs (the bundled n-hexane example cut to 100 frames, a results folder made from
it, damaged files made here). Each case says what it expects:

``works``
    exit status 0 and no traceback (a notice may be expected too);
``error``
    exit status 2, exactly one ``dihedra: error:`` line and no traceback or "Exception ignored";
``interrupt``
    a signal at a random moment: exit status 130 (SIGINT) or 143 (SIGTERM) with one line.

After every case the script checks that *nothing was lost*: every file that was in the case's
folder before is still there, byte for byte (only the output named by the case may appear), and
no hidden staging folder (``.NAME.partial-...``) is left. A case counts as clean when it ended as
expected and lost nothing.

Run from the repository root (five to ten minutes on 2 cores)::

    python benchmarks/robustness.py --markdown      # every case, then the counts (per group too)
    python benchmarks/robustness.py --only SIG      # the cases whose name contains 'SIG'
    python benchmarks/robustness.py --json out.json --repo ../older-checkout

The counts are reported in docs/robustness.md. A full disk is a small tmpfs (mounting needs root;
without it the file-size limit of the process stands in: the write then fails with EFBIG), and
so is a read-only results folder (mounted read-only: root ignores file permissions).
"""

from __future__ import annotations

import argparse
import hashlib
import json
import os
import re
import resource
import shutil
import signal
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))
REPO = os.path.dirname(HERE)
sys.path.insert(0, REPO)
#: the checkout of dihedra whose command line the cases run (--repo; default this one)
UNDER_TEST = REPO

from tests.robustness_files import short_xtc  # noqa: E402
from robustness_cases import cases, check_no_track  # noqa: E402

TIMEOUT_S = 120


def build_fixtures(root):
    """Inputs shared (copied) by the cases: the example cut short, a results folder, damaged files."""
    from dihedra import example_path

    fx = os.path.join(root, "fixtures")
    os.makedirs(fx)
    shutil.copy(example_path("hexane.pdb"), fx)
    short_xtc(example_path("hexane.pdb"), example_path("hexane.xtc"), os.path.join(fx, "hexane.xtc"), 100)
    short_xtc(example_path("hexane.pdb"), example_path("hexane.xtc"), os.path.join(fx, "long.xtc"), 1000)
    shutil.copy(example_path("trappe_ua_torsion.toml"), fx)
    _dihedra(["track", "hexane.pdb", "hexane.xtc", "--torsions", "rotatable", "--out", "res", "--keep-angles",
              "--temperature", "300"], fx)
    _dihedra(["profile", "res", "--bootstrap", "20"], fx)
    _dihedra(["kinetics", "res", "--bootstrap", "20"], fx)
    return fx


def _dihedra(argv, cwd):
    env = dict(os.environ, PYTHONPATH=UNDER_TEST)
    out = subprocess.run([sys.executable, "-m", "dihedra", *argv], cwd=cwd, env=env, capture_output=True,
                         text=True, timeout=TIMEOUT_S)
    if out.returncode:
        raise RuntimeError(f"fixture step {' '.join(argv)} failed: {out.stderr}")


def snapshot(folder):
    out = {}
    for root, dirs, files in os.walk(folder):
        for name in files:
            path = os.path.join(root, name)
            if os.path.islink(path):
                continue
            with open(path, "rb") as fh:
                out[os.path.relpath(path, folder)] = hashlib.sha256(fh.read()).hexdigest()
    return out


def _mount(case_dir, fx, mount):
    """A small tmpfs (full disk) or a read-only copy of the results folder; False without root."""
    name, size, read_only = mount
    path = os.path.join(case_dir, name)
    os.makedirs(path)
    opts = f"size={size or 64 << 20}"
    if subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", path], capture_output=True).returncode:
        return False
    if size is None:   # a results folder, then the disk filled up (or mounted read-only)
        shutil.copytree(os.path.join(fx, "res"), os.path.join(path, "res"))
        if read_only:
            subprocess.run(["mount", "-o", "remount,ro", path], check=True)
        else:
            with open(os.path.join(path, "filler"), "wb") as fh:
                try:
                    while True:
                        fh.write(b"\0" * 65536)
                except OSError:
                    pass
    return True


def _limit(limit_bytes):
    def pre():
        os.setsid()
        if limit_bytes:
            signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
            resource.setrlimit(resource.RLIMIT_FSIZE, (limit_bytes, limit_bytes))
    return pre


def run_case(case, fx, work):
    mounted = []
    try:
        return _run_case(case, fx, work, mounted)
    finally:
        for path in mounted:
            subprocess.run(["umount", "-l", path], capture_output=True)


def _run_case(case, fx, work, mounts):
    d = os.path.join(work, re.sub(r"[^0-9A-Za-z]+", "-", case.name).strip("-"))
    os.makedirs(d)
    mounted = None
    limit = None
    if case.mount:
        if _mount(d, fx, case.mount):
            mounted = os.path.join(d, case.mount[0])
            mounts.append(mounted)
        elif case.limit_bytes:
            limit = case.limit_bytes
            os.makedirs(os.path.join(d, case.mount[0]), exist_ok=True)
        else:
            shutil.rmtree(d)
            return {"name": case.name, "outcome": "not tried (needs root to mount a file system)", "clean": None}
    if case.setup:
        case.setup(fx, d)
    before = snapshot(d)
    env = dict(os.environ, PYTHONPATH=UNDER_TEST, PYTHONIOENCODING="utf-8")
    t0 = time.time()
    proc = subprocess.Popen([sys.executable, "-m", "dihedra", *case.argv], cwd=d, env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, preexec_fn=_limit(limit))
    head = ""
    if case.signal_after:   # the signal comes a random time after the run has started its first replica
        sig, after = case.signal_after
        while True:
            line = proc.stderr.readline()
            head += line
            if not line or line.startswith("replica 1/"):
                break
        time.sleep(after)
        if proc.poll() is None:
            proc.send_signal(sig)
    try:
        stdout, stderr = proc.communicate(timeout=case.max_seconds or TIMEOUT_S)
        stderr = head + stderr
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        stdout, stderr = proc.communicate()
        stderr += "\n[killed: timeout]"
    seconds = time.time() - t0
    outcome, why = classify(case, proc.returncode, stdout, stderr, seconds)
    lost = lost_files(case, d, before, finished=proc.returncode == 0 or "was written (it is complete)" in stderr)
    if case.check and outcome == "as expected" and not lost:
        problem = case.check(d, stderr) if case.check is check_no_track else case.check(d)
        if problem:
            outcome, why = "wrong", problem
    result = {"name": case.name, "expect": case.expect, "returncode": proc.returncode, "seconds": round(seconds, 1),
              "outcome": outcome, "why": why, "lost": lost, "clean": outcome == "as expected" and not lost,
              "stderr_tail": stderr.strip().splitlines()[-3:]}
    if not result["clean"]:
        result["stderr"] = stderr
    shutil.rmtree(d, ignore_errors=True)
    return result


def classify(case, rc, stdout, stderr, seconds):
    tb = "Traceback" in stderr or "Exception ignored" in stderr
    errors = [line for line in stderr.splitlines() if line.startswith("dihedra: error:")]
    if rc is not None and rc < 0:
        return "crash", f"killed by signal {-rc}"
    if tb:
        return "traceback", "a traceback was printed"
    if case.max_seconds and seconds > case.max_seconds:
        return "slow", f"took {seconds:.0f} s"
    if case.expect == "works":
        if rc != 0:
            return "wrong", f"exit {rc}: {errors[:1]}"
        if case.notice and case.notice not in stderr + stdout:
            return "wrong", f"no notice containing {case.notice!r}"
        return "as expected", ""
    if case.expect == "interrupt":
        if rc == 0:   # the signal came after the end: a finished run is fine too
            return "as expected", "finished before the signal"
        if rc in (130, 143) and len(stderr.strip().splitlines()[-1:]) == 1:
            return "as expected", ""
        return "wrong", f"exit {rc}"
    if rc != 2:
        return "wrong", f"exit {rc}"
    if len(errors) != 1:
        return "wrong", f"{len(errors)} error lines"
    return "as expected", ""


def lost_files(case, d, before, finished):
    """Files of the case folder that changed (or went away), but the case's own output (which a
    finished run may replace), and staging folders left behind."""
    after = snapshot(d)
    lost = []
    for rel, digest in before.items():
        if after.get(rel) != digest:
            mine = finished and case.output and (rel == case.output or rel.startswith(case.output + os.sep))
            if not mine:
                lost.append(rel)
    for root, dirs, files in os.walk(d):
        for name in dirs:
            if ".partial-" in name or ".old-" in name:
                lost.append(os.path.relpath(os.path.join(root, name), d) + " (staging folder left)")
    return lost


GROUPS = [   # (group, test of the case name), first match wins
    ("signals at random moments", lambda n: n.startswith(("SIGINT", "SIGTERM"))),
    ("user's files (--out, --overwrite)", lambda n: "--out" in n or "--overwrite" in n),
    ("damaged results folders", lambda n: "on a folder with" in n),
    ("full disk, read-only folder", lambda n: "full disk" in n or "read-only" in n),
    ("trajectories", lambda n: "XTC" in n or "DCD" in n or "trajectory" in n),
    ("analysis files (dihedra run)", lambda n: n.startswith("run ")),
    ("cluster", lambda n: "scheduler" in n),
    ("names with spaces and non-ASCII", lambda n: "non-ASCII" in n),
    ("option values", lambda n: n.split()[1].startswith("--") if len(n.split()) > 1 else False),
    ("input files", lambda n: True),
]


def group_of(name):
    return next(g for g, test in GROUPS if test(name))


def markdown(results):
    """The counts per group of cases, as a Markdown table (for docs/robustness.md)."""
    rows = ["| cases | tried | ended as expected | clean error (exit 2, one line) | worked (exit 0) | "
            "stopped cleanly | nothing lost |", "| --- | --- | --- | --- | --- | --- | --- |"]
    order = [g for g, _ in GROUPS]
    groups = sorted({group_of(r["name"]) for r in results}, key=order.index)
    for g in groups + ["all"]:
        rs = [r for r in results if r["clean"] is not None and (g == "all" or group_of(r["name"]) == g)]
        ok = [r for r in rs if r["outcome"] == "as expected"]
        stopped = [r["expect"] == "interrupt" and r["returncode"] != 0 for r in ok]   # else: finished before it
        cells = [len(rs), len(ok), sum(r["expect"] == "error" for r in ok), len(ok) - sum(stopped)
                 - sum(r["expect"] == "error" for r in ok), sum(stopped), sum(not r["lost"] for r in rs)]
        name = "**all**" if g == "all" else g
        rows.append(f"| {name} | " + " | ".join(str(x) for x in cells) + " |")
    return "\n".join(rows)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", default=None, help="run the cases whose name contains this text")
    parser.add_argument("--json", default=None, help="write every outcome to this JSON file")
    parser.add_argument("--keep", action="store_true", help="keep the work folder")
    parser.add_argument("--markdown", action="store_true", help="also print the counts per group as a table")
    parser.add_argument("--repo", default=REPO, help="the dihedra checkout to run (default: this one), e.g. an "
                                                       "older version to compare with")
    args = parser.parse_args(argv)
    global UNDER_TEST
    UNDER_TEST = os.path.abspath(args.repo)
    work = tempfile.mkdtemp(prefix="dihedra-robustness-")
    try:
        fx = build_fixtures(work)
        todo = [c for c in cases() if args.only is None or args.only in c.name]
        results = []
        for case in todo:
            r = run_case(case, fx, os.path.join(work, "cases"))
            results.append(r)
            mark = {True: "ok  ", False: "FAIL", None: "skip"}[r["clean"]]
            extra = "" if r["clean"] in (True, None) else (f"  [{r['outcome']}: {r.get('why')}; lost "
                                                           f"{r.get('lost')[:3]}; {r.get('stderr_tail')}]")
            print(f"{mark} {r['name']} ({r.get('seconds', 0)} s){extra}", flush=True)
        tried = [r for r in results if r["clean"] is not None]
        counts = {
            "cases": len(results), "tried": len(tried),
            "ended as expected": sum(r["outcome"] == "as expected" for r in tried),
            "clean errors (exit 2, one line)": sum(r["outcome"] == "as expected" and r["expect"] == "error"
                                                   for r in tried),
            "worked (exit 0)": sum(r["outcome"] == "as expected" and r["expect"] == "works" for r in tried),
            "interrupted cleanly": sum(r["outcome"] == "as expected" and r["expect"] == "interrupt"
                                       and r["returncode"] != 0 for r in tried),
            "finished before the signal": sum(r["outcome"] == "as expected" and r["expect"] == "interrupt"
                                              and r["returncode"] == 0 for r in tried),
            "longest signal case (s)": max([r["seconds"] for r in tried if r["expect"] == "interrupt"] or [0]),
            "nothing lost": sum(not r["lost"] for r in tried),
            "tracebacks": sum(r["outcome"] == "traceback" for r in tried),
            "crashes": sum(r["outcome"] == "crash" for r in tried),
        }
        print(json.dumps(counts, indent=1))
        if args.markdown:
            print(markdown(results))
        if args.json:
            with open(args.json, "w", encoding="utf-8") as fh:
                json.dump({"counts": counts, "cases": results}, fh, indent=1)
        return 0 if counts["ended as expected"] == counts["tried"] == counts["nothing lost"] else 1
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
