#!/usr/bin/env python3
"""Runs the README's Python example (the ```python block after the marker
"<!-- readme-test: python -->") on a fresh demo run and checks what it prints
against the demo's CSV component table, read here with the csv module: the
row count, the count above 50 sigma, the brightest flux density, and that the
rms map's BUNIT parses as a unit (astropy.units) and gives a median rms at the
components within the range of the table's own rms column.

usage: readme_python_test.py SKERRY_BINARY README.md
"""
import csv
import os
import re
import subprocess
import sys
import tempfile


def example(readme):
    text = open(readme, encoding="utf-8").read()
    m = re.search(r"<!-- readme-test: python -->\s*```python\n(.*?)```", text, re.S)
    if not m:
        sys.exit("README: no ```python block after <!-- readme-test: python -->")
    return m.group(1)


def main():
    skerry, readme = sys.argv[1], sys.argv[2]
    code = example(readme)
    with tempfile.TemporaryDirectory(prefix="skerry-readme-") as tmp:
        subprocess.run([skerry, "demo", "--out", "outputs/demo", "--quiet", "--threads", "2"], cwd=tmp, check=True)
        r = subprocess.run([sys.executable, "-c", code], cwd=tmp, capture_output=True, text=True)
        if r.returncode != 0:
            sys.exit("the README example failed:\n" + r.stderr)
        out = r.stdout
        print(out)
        with open(os.path.join(tmp, "outputs/demo/run/lanternfish_1400MHz.components.csv"), newline="") as f:
            rows = list(csv.DictReader(f))
    failures = []
    n = len(rows)
    bright = [row for row in rows if float(row["snr"]) > 50]
    m = re.search(r"^(\d+) components, (\d+) above 50 sigma$", out, re.M)
    if not m or (int(m.group(1)), int(m.group(2))) != (n, len(bright)):
        failures.append(f"counts: expected '{n} components, {len(bright)} above 50 sigma'")
    top = max(float(row["s_int_jy"]) for row in bright) * 1e3
    m = re.search(r"^brightest: ([0-9.eE+-]+) mJy$", out, re.M)
    if not m or abs(float(m.group(1)) - top) > 1e-6 * top:
        failures.append(f"brightest: expected {top} mJy")
    rms = sorted(float(row["rms_jy_per_beam"]) * 1e6 for row in rows)
    m = re.search(r"^median rms at the components: ([0-9.eE+-]+) uJy / beam$", out, re.M)
    if not m or not (rms[0] - 0.1 <= float(m.group(1)) <= rms[-1] + 0.1):
        failures.append(f"median rms: expected a value in [{rms[0]:.1f}, {rms[-1]:.1f}] uJy / beam")
    if failures:
        sys.exit("README example: " + "; ".join(failures))
    print("README example: output agrees with the CSV table")


if __name__ == "__main__":
    main()
