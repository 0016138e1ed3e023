#!/usr/bin/env python3
"""Citation and self-containment check of the repository.

Scans every tracked text file (git ls-files; every file below the root when the
tree is not a git checkout) and fails when:
  1. a citation key REF-TOPIC-NN is not a heading of docs/REFERENCES.md;
  2. a section cited as CONVENTIONS "Title" (or CONVENTIONS.md "Title") is not a
     heading of docs/CONVENTIONS.md;
  3. a file names a path outside the repository: an absolute path under a user
     or machine folder (home directories, /work, /mnt, /scratch), or a relative
     path that climbs out of the repository root.
Prints one line per finding (file:line: what) and exits 1; exits 0 when clean.

Usage: check_citations.py ROOT          check the repository at ROOT
       check_citations.py --self-test   check that each kind of finding is found
"""
import os
import re
import subprocess
import sys
import tempfile

KEY = re.compile(r"\bREF-[A-Z]+-[0-9]+[a-z]?\b")
HEADING = re.compile(r"^#{1,6}\s+(.*?)\s*$")
CONV_CITE = re.compile(r"\bCONVENTIONS(?:\.md)?\s*[,:]?\s*\"([^\"]+)\"")
# Absolute paths into machine- or user-specific folders. /tmp, /srv, /usr, /dev
# and /proc name places every machine has (scratch space, example deployments,
# system files) and are allowed.
ABS_PATH = re.compile(r"(?:^|[\s\"'`(=:,<])(/(?:" + "|".join(
    ["work", "home", "Users", "root", "mnt", "scratch", "media"]) + r")/[\w./-]*)")
REL_UP = re.compile(r"(?:^|[^\w./-])((?:\.\./)+[\w.-]*)")
SELF = "tests/docs/check_citations.py"


def tracked_files(root):
    try:
        out = subprocess.run(["git", "-C", root, "ls-files", "-z"], check=True,
                             capture_output=True).stdout
        files = [f for f in out.decode("utf-8", "replace").split("\0") if f]
        if files:
            return files
    except (OSError, subprocess.CalledProcessError):
        pass
    files = []
    for d, dirs, names in os.walk(root):
        dirs[:] = [x for x in dirs if not x.startswith(".") and not x.startswith("build")]
        files += [os.path.relpath(os.path.join(d, n), root) for n in names]
    return files


def read_text(path):
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError:
        return None
    if b"\0" in data:
        return None  # binary (FITS, PNG, ...)
    return data.decode("utf-8", "replace")


def headings(path):
    text = read_text(path) or ""
    return [m.group(1) for m in map(HEADING.match, text.splitlines()) if m]


def check(root):
    root = os.path.abspath(root)
    problems = []
    ref_path = os.path.join(root, "docs", "REFERENCES.md")
    conv_path = os.path.join(root, "docs", "CONVENTIONS.md")
    for p in (ref_path, conv_path):
        if not os.path.isfile(p):
            problems.append(f"{os.path.relpath(p, root)}: missing")
    keys = set()
    for h in headings(ref_path):
        keys.update(KEY.findall(h))
    sections = {h.strip() for h in headings(conv_path)}
    n_keys = n_conv = 0
    for rel in sorted(tracked_files(root)):
        if rel == SELF:
            continue
        text = read_text(os.path.join(root, rel))
        if text is None:
            continue
        for ln, line in enumerate(text.splitlines(), 1):
            for k in KEY.findall(line):
                n_keys += 1
                if k not in keys:
                    problems.append(f"{rel}:{ln}: citation key {k} has no heading in docs/REFERENCES.md")
            for s in CONV_CITE.findall(line):
                n_conv += 1
                if s.strip() not in sections:
                    problems.append(f"{rel}:{ln}: section \"{s}\" is not a heading of docs/CONVENTIONS.md")
            for p in ABS_PATH.findall(line):
                problems.append(f"{rel}:{ln}: path outside the repository: {p}")
            for p in REL_UP.findall(line):
                target = os.path.normpath(os.path.join(root, os.path.dirname(rel), p))
                if os.path.commonpath([root, target]) != root:
                    problems.append(f"{rel}:{ln}: relative path leaves the repository: {p}")
    return problems, n_keys, n_conv, len(keys)


def self_test():
    """Each kind of finding is reported, and a clean tree passes."""
    with tempfile.TemporaryDirectory() as d:
        os.makedirs(os.path.join(d, "docs"))
        os.makedirs(os.path.join(d, "src"))
        with open(os.path.join(d, "docs", "REFERENCES.md"), "w") as f:
            f.write("# refs\n### REF-ABC-01 Something\n")
        with open(os.path.join(d, "docs", "CONVENTIONS.md"), "w") as f:
            f.write("# conventions\n## Noise\n")
        clean = os.path.join(d, "src", "a.cpp")
        with open(clean, "w") as f:
            f.write('// REF-ABC-01 and CONVENTIONS.md "Noise"; see ../docs/REFERENCES.md\n')
        problems, n_keys, n_conv, _ = check(d)
        if problems or n_keys != 2 or n_conv != 1:  # the heading counts as a use
            print("self-test: a clean tree was not accepted:", problems, n_keys, n_conv)
            return 1
        bad = [
            ("// REF-ABC-02\n", "REF-ABC-02"),
            ('// CONVENTIONS "Signal"\n', '"Signal"'),
            ("// see " + "/" + "home/someone/notes.md\n", "outside the repository"),
            ("// see ../../elsewhere/notes.md\n", "leaves the repository"),
        ]
        for content, expect in bad:
            with open(clean, "w") as f:
                f.write(content)
            problems, _, _, _ = check(d)
            if len(problems) != 1 or expect not in problems[0]:
                print(f"self-test: {content.strip()!r} gave {problems}, expected one finding with {expect!r}")
                return 1
    print("self-test: every kind of finding is reported; a clean tree passes")
    return 0


def main():
    if len(sys.argv) == 2 and sys.argv[1] == "--self-test":
        return self_test()
    if len(sys.argv) != 2:
        print(__doc__.strip().splitlines()[-2])
        return 2
    problems, n_keys, n_conv, n_defined = check(sys.argv[1])
    for p in problems:
        print(p)
    print(f"{n_keys} key citations and {n_conv} section citations checked against "
          f"{n_defined} keys in docs/REFERENCES.md: {len(problems)} problem(s)")
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
