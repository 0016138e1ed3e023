#!/usr/bin/env bash
# Builds a ThreadSanitizer-instrumented libtbb.so.12 from Debian's source package
# of the installed oneTBB (same version, same Debian patches, so it is a drop-in
# for the packaged library at run time) and prints the folder that holds it.
#
# Why: Debian's libtbb is not built with -fsanitize=thread, so TSan cannot see the
# synchronisation inside TBB's scheduler (the hand-off of a loop's data to the
# worker threads and the join at its end) and reports every such hand-off as a
# race. With the instrumented library on LD_LIBRARY_PATH the TSan tests need no
# suppressions, and races between loop bodies are really checked.
#
#   scripts/tsan-tbb.sh [build_dir=build-tsan-tbb]    (needs root for apt-get)
set -euo pipefail
cd "$(dirname "$0")/.."
out=$(realpath -m "${1:-build-tsan-tbb}")
version=$(dpkg-query -W -f='${Version}' libtbb-dev)
lib=$(find "$out/build" -name libtbb.so.12 2>/dev/null | head -1 || true)
if [ -n "$lib" ] && [ "$(cat "$out/version" 2>/dev/null)" = "$version" ]; then
  dirname "$lib"
  exit 0
fi
rm -rf "$out" && mkdir -p "$out"
# A private deb-src list: the machine's own apt sources stay as they are.
cat >"$out/sources.sources" <<EOF
Types: deb-src
URIs: http://deb.debian.org/debian
Suites: bookworm bookworm-updates
Components: main
Signed-By: /usr/share/keyrings/debian-archive-keyring.gpg
EOF
apt_src=(-o Dir::Etc::sourcelist="$out/sources.sources" -o Dir::Etc::sourceparts=- -o APT::Get::List-Cleanup=0)
apt-get "${apt_src[@]}" update -qq >&2
(cd "$out" && apt-get "${apt_src[@]}" source --download-only -qq "onetbb=$version" >&2 2>/dev/null)
dpkg-source -x "$out"/onetbb_*.dsc "$out/src" >/dev/null
cmake -S "$out/src" -B "$out/build" -G Ninja -DCMAKE_BUILD_TYPE=RelWithDebInfo -DTBB_SANITIZE=thread \
  -DTBB_TEST=OFF -DTBB_EXAMPLES=OFF -DTBBMALLOC_BUILD=OFF -DTBB_STRICT=OFF >&2
cmake --build "$out/build" --parallel "$(nproc)" --target tbb >&2
echo "$version" >"$out/version"
dirname "$(find "$out/build" -name libtbb.so.12 | head -1)"
