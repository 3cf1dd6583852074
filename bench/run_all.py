"""Run every benchmark script in this folder, one after another, and print what each reports.

Usage: python bench/run_all.py [NAME ...]   (names without the bench_ prefix, e.g. counts estimate)
"""
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main(argv):
    scripts = sorted(HERE.glob("bench_*.py"))
    if argv:
        scripts = [s for s in scripts if s.stem.removeprefix("bench_") in argv]
    failed = 0
    for script in scripts:
        print(f"== {script.name}", flush=True)
        start = time.perf_counter()
        rc = subprocess.call([sys.executable, str(script)], cwd=HERE)
        print(f"   ({time.perf_counter() - start:.1f} s, exit {rc})", flush=True)
        failed += rc != 0
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
