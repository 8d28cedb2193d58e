#!/usr/bin/env bash
# Prepare (or reuse) the project's virtual environment.
#
#   1. As root with apt: install Debian's MUMPS (libmumps-scotch-dev) and OpenBLAS
#      (libopenblas0-pthread) so Kwant links the fast sparse solver and MUMPS runs on OpenBLAS.
#      Elsewhere (a cluster login node): carry on and say what is missing and what it costs.
#   2. Create .venv (or reuse it), install the build prerequisites pinned in
#      requirements/constraints.txt, build Kwant 1.5.0 from source with Cython 3 (its shipped
#      C files predate NumPy 2), then install this package with its dependencies.
#   3. Print which Kwant solver and which BLAS the environment ended up with.
#
# Idempotent: a second run with unchanged pins does nothing but print the report.
set -euo pipefail

here=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)
cd "$here"
VENV=${VENV:-$here/.venv}
PY=${PYTHON:-python3}
constraints=$here/requirements/constraints.txt
stamp=$VENV/.helisweep-setup
say() { printf '[setup] %s\n' "$*"; }

# ---- 1. system libraries -------------------------------------------------------------
apt_pkgs=(libmumps-scotch-dev libopenblas0-pthread pkg-config)
missing=()
for p in "${apt_pkgs[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q 'install ok installed' || missing+=("$p")
done
if [ ${#missing[@]} -gt 0 ]; then
  if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
    say "installing Debian packages: ${missing[*]}"
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq >/dev/null || say "apt-get update failed; trying the install anyway"
    if ! apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null; then
      say "WARNING: apt-get install failed; continuing without ${missing[*]}"
    fi
  else
    say "WARNING: not root or no apt-get: cannot install ${missing[*]}."
    say "  Without libmumps-scotch-dev Kwant falls back to SciPy's sparse solver (several times"
    say "  slower per solve); without libopenblas0-pthread MUMPS runs on the reference BLAS"
    say "  (measured ~1.7x slower at 200x80 sites). Ask the admins, or load a MUMPS module."
  fi
fi
have_mumps=no
[ -e /usr/include/dmumps_c.h ] || [ -e /usr/include/MUMPS/dmumps_c.h ] && have_mumps=yes

# ---- 2. virtual environment ---------------------------------------------------------------
want=$(cat "$constraints" pyproject.toml | sha256sum | cut -c1-16)-mumps-$have_mumps
if [ -f "$stamp" ] && [ "$(cat "$stamp")" = "$want" ] && "$VENV/bin/python" -c 'import kwant, pipeline' 2>/dev/null; then
  say "reusing $VENV (pins unchanged)"
else
  [ -x "$VENV/bin/python" ] || { say "creating $VENV"; "$PY" -m venv "$VENV"; }
  pip=("$VENV/bin/python" -m pip --disable-pip-version-check -q)
  "${pip[@]}" install -c "$constraints" pip
  "${pip[@]}" install -c "$constraints" setuptools wheel cython numpy scipy tinyarray
  # Rebuild Kwant when it is missing or was built without MUMPS that is now available.
  kwant_solver=$("$VENV/bin/python" -c 'import kwant.solvers.default as d; print(type(d.smatrix.__self__).__module__)' 2>/dev/null || echo none)
  if [ "$kwant_solver" = none ] || { [ $have_mumps = yes ] && [ "$kwant_solver" != kwant.solvers.mumps ]; }; then
    say "building Kwant 1.5.0 from source (about 70 s)"
    "${pip[@]}" install -c "$constraints" --no-build-isolation --no-cache-dir --force-reinstall --no-deps \
        --global-option=--cython kwant==1.5.0 2>&1 | grep -v -i 'global-option\|deprecat' || true
    "$VENV/bin/python" -c 'import kwant' || { say "ERROR: Kwant build failed"; exit 1; }
  fi
  "${pip[@]}" install -c "$constraints" -e ".[test]"
  echo "$want" > "$stamp"
fi

# ---- 3. report ----------------------------------------------------------------------------
"$VENV/bin/python" -m pipeline.transport.environment
