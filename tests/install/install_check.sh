#!/usr/bin/env bash
# Installs the build into a temporary prefix and builds the embedding example against it with
# nothing but pkg-config, as a C user outside this tree would; then runs it on the shipped
# example bundle and checks that every installed public header compiles on its own.
set -euo pipefail
build=$1; src=$2
prefix=$(mktemp -d)
trap 'rm -rf "$prefix"' EXIT
cmake --install "$build" --prefix "$prefix" >/dev/null
export PKG_CONFIG_PATH=$prefix/lib/pkgconfig
for h in "$prefix"/include/veer/*.h; do
  echo "#include \"veer/$(basename "$h")\"" | cc -std=c11 -Wall -Werror -x c -fsyntax-only \
    $(pkg-config --cflags veer) - || { echo "header $h does not compile alone"; exit 1; }
done
cc -std=c11 -Wall -Werror "$src/examples/embed.c" $(pkg-config --cflags --libs veer) -o "$prefix/embed"
out=$(LD_LIBRARY_PATH=$prefix/lib "$prefix/embed" "$src/examples/parcel-arm-untrained.veer" \
  "$src/examples/parcel-arm-samples.csv" "$src/examples/parcel-arm-rewards.csv")
echo "$out"
grep -q "model parcel-arm-untrained-1" <<<"$out"
test "$(grep -c 'action \[' <<<"$out")" -eq 8
for exe in veer veerd; do test -x "$prefix/bin/$exe" || { echo "missing $exe"; exit 1; }; done
echo "install check passed"
