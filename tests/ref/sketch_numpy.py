"""sketch_numpy: the quantile sketch against numpy on 10^6 samples.

numpy is the outside reference here: the sketch's answers (through the
sketchprobe tool, which also round-trips the sketch through its checkpoint
encoding) are compared with numpy's exact order statistics of the same
samples. DDSketch (Masson, Rim & Lee 2019; docs/methods.md section 7) promises
|estimate - x_q| <= a * x_q for x_q the element of 1-based rank
floor(1 + q(n - 1)). np.quantile(x, q, method='lower') returns exactly that
element: the sorted element at 0-based index floor(q(n - 1)); the script
also checks that equivalence on the sorted array.

Two runs, both lognormal(mu=4, sigma=1) latencies with a fixed seed:
  1. accuracy 0.01, the default 512 buckets: every quantile within 0.01.
  2. accuracy 0.01, a cap of 200 buckets (the data need about 500): the
     upper quantiles stay within 0.01 while the median, which now lies in
     the collapsed low bucket, does not (shows the cap really bites).

Needs /usr/bin/python3 with Debian's python3-numpy; env STOPCOCK_BUILD is
the build directory holding tests/sketchprobe. Prints TAP; exits 1 on any
failure.
"""
import os
import subprocess
import sys
import tempfile

import numpy as np

N = 1_000_000
SEED = 20240917
QS = ["0.5", "0.9", "0.95", "0.99", "0.999"]
ACCURACY = 0.01

build = os.environ.get("STOPCOCK_BUILD", "build")
probe = os.path.join(build, "tests", "sketchprobe")
tests = []
failed = 0


def ok(cond, name, detail=""):
    global failed
    tests.append(name)
    n = len(tests)
    if cond:
        print(f"ok {n} - {name}")
    else:
        failed += 1
        print(f"not ok {n} - {name}")
        if detail:
            print(f"# {detail}")
    sys.stdout.flush()


def run_probe(path, buckets):
    out = subprocess.run(
        [probe, str(ACCURACY), str(buckets), path] + QS,
        check=True, capture_output=True, text=True, timeout=120).stdout
    info, est = {}, {}
    for line in out.splitlines():
        f = line.split()
        if f[0] == "q":
            est[f[1]] = (float(f[2]), float(f[3]))
        else:
            info[f[0]] = int(f[1])
    return info, est


def main():
    rng = np.random.default_rng(SEED)
    x = rng.lognormal(mean=4.0, sigma=1.0, size=N)
    xs = np.sort(x)
    truth = {}
    for q in QS:
        qf = float(q)
        lower = float(np.quantile(x, qf, method="lower"))
        rank_elem = float(xs[int(np.floor(qf * (N - 1)))])
        truth[q] = lower
        ok(lower == rank_elem,
           f"numpy method='lower' at q={q} is rank floor(1+q(n-1))",
           f"{lower} vs {rank_elem}")

    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "samples.f64")
        x.astype("<f8" if sys.byteorder == "little" else ">f8").tofile(path)

        info, est = run_probe(path, 512)
        ok(info["count"] == N, "default sketch counted every sample",
           str(info))
        ok(info["bytes"] <= 8192, "default sketch holds <= 8 KiB",
           f"bytes {info['bytes']}")
        ok(info["nbuckets"] <= 512, "default sketch within its bucket cap",
           f"nbuckets {info['nbuckets']}")
        for q in QS:
            got, dec = est[q]
            rel = abs(got - truth[q]) / truth[q]
            ok(rel <= ACCURACY * (1 + 1e-12),
               f"default q={q}: {got:.6g} vs numpy {truth[q]:.6g} "
               f"(rel {rel:.2e})")
            ok(dec == got, f"default q={q}: decoded sketch agrees",
               f"{dec} vs {got}")

        info, est = run_probe(path, 200)
        ok(info["nbuckets"] <= 200, "capped sketch within 200 buckets",
           f"nbuckets {info['nbuckets']}")
        ok(info["bytes"] <= 200 * 8 + 256, "capped sketch memory bounded",
           f"bytes {info['bytes']}")
        for q in QS:
            got, dec = est[q]
            rel = abs(got - truth[q]) / truth[q]
            if q == "0.5":
                ok(rel > ACCURACY,
                   f"capped q=0.5 collapsed as designed: {got:.6g} vs "
                   f"numpy {truth[q]:.6g}")
            else:
                ok(rel <= ACCURACY * (1 + 1e-12),
                   f"capped q={q}: {got:.6g} vs numpy {truth[q]:.6g} "
                   f"(rel {rel:.2e})")
            ok(dec == got, f"capped q={q}: decoded sketch agrees",
               f"{dec} vs {got}")
    print(f"1..{len(tests)}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
