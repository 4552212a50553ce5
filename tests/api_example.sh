#!/bin/sh
# Build tests/api_example.c against the library installed under PREFIX, as
# another program would: only through pkg-config, with nothing from the
# source tree on the include or library path; then run it.
# Usage: api_example.sh PREFIX EXAMPLE.c MODELS_DIR DATA_DIR OUT_DIR
set -eu
prefix=$1 example=$2 models=$3 data=$4 out=$5
pc=$(find "$prefix" -name recoup.pc | head -n 1)
if [ -z "$pc" ]; then echo "FAIL: no recoup.pc under $prefix"; exit 1; fi
export PKG_CONFIG_PATH=$(dirname "$pc")
libdir=$(pkg-config --variable=libdir recoup)
cflags=$(pkg-config --cflags recoup)
libs=$(pkg-config --libs recoup)
echo "pkg-config --cflags recoup: $cflags"
echo "pkg-config --libs recoup:   $libs"
rm -rf "$out"
mkdir -p "$out"
${CC:-cc} -std=c11 -Wall -Wextra -Werror ${RECOUP_EXAMPLE_CFLAGS:-} $cflags -o "$out/api_example" "$example" $libs -Wl,-rpath,"$libdir"
# The static library with what `pkg-config --static` lists for it: linked
# (not run), so a dependency missing from recoup.pc's static link line
# (MPI's libraries in a build with MPI, say) fails here.
static_libs=
for f in $(pkg-config --static --libs recoup); do
  case $f in
    -lrecoup) static_libs="$static_libs $libdir/librecoup.a" ;;
    *) static_libs="$static_libs $f" ;;
  esac
done
echo "static link: $static_libs"
${CC:-cc} -std=c11 -Wall -Wextra -Werror ${RECOUP_EXAMPLE_CFLAGS:-} $cflags -o "$out/api_example_static" "$example" $static_libs
if ldd "$out/api_example_static" | grep -q librecoup; then
  echo "FAIL: api_example_static loads librecoup.so instead of holding librecoup.a"; exit 1
fi
# The program must use the installed shared library, not a build-tree copy.
ldd "$out/api_example" | grep librecoup
case $(ldd "$out/api_example" | grep librecoup) in
  *"$libdir"*) ;;
  *) echo "FAIL: api_example does not load librecoup from $libdir"; exit 1 ;;
esac
exec "$out/api_example" "$models" "$data" "$out"
