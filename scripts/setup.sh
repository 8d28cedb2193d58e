#!/usr/bin/env bash
# Prepare (or reuse) the project's virtual environment.
#
#   bash scripts/setup.sh               detect the install route, install, report
#   bash scripts/setup.sh --plan        only detect: print the route, the steps and the advice
#   bash scripts/setup.sh --kwant-only  stop once Kwant is in the environment (CI's build check)
#
# Install routes (scripts/install_plan.py decides; HELISWEEP_ROUTE=apt|conda|site-mumps forces):
#   apt         root with apt-get: install Debian's MUMPS (libmumps-scotch-dev) and OpenBLAS
#               (libopenblas0-pthread), so Kwant links the fast sparse solver and MUMPS runs on
#               OpenBLAS. Also taken without root when Debian's MUMPS is already installed.
#   conda       an active conda/mamba environment (CONDA_PREFIX) whose Python imports Kwant
#               (conda-forge's build brings MUMPS): .venv is made on that Python with its
#               packages visible, and that Kwant is used; nothing is compiled.
#   site-mumps  HELISWEEP_MUMPS_DIR=/prefix (or HELISWEEP_MUMPS_LIB_DIR and
#               HELISWEEP_MUMPS_INCLUDE_DIR): Kwant is built against that MUMPS through its
#               build configuration file, build.conf (a [mumps] section).
#   scipy       none of these: Kwant is built without MUMPS and uses SciPy's sparse solver
#               (several times slower per sample); the set-up ends with the other routes' commands.
#
# Outside the conda route Kwant (version pinned in requirements/constraints.txt) is built from
# its source distribution as a wheel, with `--cython` passed through --config-settings so its C
# files are regenerated with Cython 3 (the shipped ones predate NumPy 2), and that wheel is
# installed. Then this package is installed with every version in requirements/constraints.txt,
# and the Kwant solver and the BLAS actually loaded are printed.
#
# Idempotent: a second run with unchanged pins and route does nothing but print the report.
set -euo pipefail

here=$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)
cd "$here"
VENV=${VENV:-$here/.venv}
PY=${PYTHON:-python3}
constraints=$here/requirements/constraints.txt
stamp=$VENV/.helisweep-setup
say() { printf '[setup] %s\n' "$*"; }
die() { printf '[setup] ERROR: %s\n' "$*" >&2; exit 2; }

mode=install
case "${1:-}" in
  "") ;;
  --plan) mode=plan ;;
  --kwant-only) mode=kwant ;;
  -h|--help) sed -n '2,6p' "$0"; exit 0 ;;
  *) die "unknown option '$1'; use --plan, --kwant-only or no option" ;;
esac

command -v "$PY" >/dev/null 2>&1 || die "no Python interpreter '$PY'; set PYTHON=/path/to/python3.11 (or newer), e.g. after \`module load python\`"
kwant_version=$(sed -n 's/^kwant==\([^ #]*\).*/\1/p' "$constraints")
[ -n "$kwant_version" ] || die "no kwant==VERSION line in $constraints; add one (e.g. kwant==1.5.0)"

# ---- 1. the route ---------------------------------------------------------------------------
plan=$("$PY" "$here/scripts/install_plan.py" plan --python "$PY") || exit 2
eval "$plan"
say "install route: $ROUTE ($ROUTE_REASON)"

advise() {
  [ "$ADVISE" = yes ] || return 0
  "$PY" "$here/scripts/install_plan.py" advice "$ROUTE" | sed 's/^/[setup] /'
}

build_conf=""
if [ "$ROUTE" = site-mumps ]; then
  build_conf=$(mktemp "${TMPDIR:-/tmp}/helisweep-build.conf.XXXXXX")
  trap 'rm -f "$build_conf"' EXIT
  "$PY" "$here/scripts/install_plan.py" build-conf "$build_conf" || exit 2
fi

if [ "$mode" = plan ]; then
  case "$ROUTE" in
    apt)   if [ "$CAN_APT" = yes ] && [ -n "$APT_MISSING" ]; then say "would install Debian packages: $APT_MISSING"; fi
           say "would build Kwant $kwant_version from source; its build finds Debian's MUMPS" ;;
    conda) if [ -n "$CONDA_INSTALL" ]; then say "would run: $CONDA_INSTALL"; fi
           say "would make $VENV on $BASE_PYTHON with the conda packages visible, use its Kwant" ;;
    site-mumps) say "would build Kwant $kwant_version from source with this build.conf:"
           sed 's/^/[setup]     /' "$build_conf" ;;
    scipy) say "would build Kwant $kwant_version from source without MUMPS (SciPy's sparse solver)" ;;
  esac
  if [ "$ROUTE" != conda ] && [ -n "$APT_MISSING" ] && [ "$CAN_APT" = no ]; then
    say "not installed (no root or no apt-get): $APT_MISSING"
  fi
  advise
  exit 0
fi

# ---- 2. system libraries --------------------------------------------------------------------
if [ "$ROUTE" = apt ] && [ "$CAN_APT" = yes ] && [ -n "$APT_MISSING" ]; then
  say "installing Debian packages: $APT_MISSING"
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq >/dev/null || say "apt-get update failed; trying the install anyway"
  # shellcheck disable=SC2086  # a list of package names
  if ! apt-get install -y -qq --no-install-recommends $APT_MISSING >/dev/null; then
    say "WARNING: apt-get install failed; continuing without $APT_MISSING"
  fi
  dpkg-query -W -f='${Status}' libmumps-scotch-dev 2>/dev/null | grep -q 'install ok installed' || EXPECT_MUMPS=no
elif [ "$ROUTE" != conda ] && [ -n "$APT_MISSING" ] && [ "$CAN_APT" = no ]; then
  case " $APT_MISSING " in
    *" libopenblas0-pthread "*) [ "$ROUTE" = apt ] && say "WARNING: without libopenblas0-pthread MUMPS runs on the reference BLAS (measured ~1.7x slower at 200x80 sites)" ;;
  esac
  if [ "$ROUTE" = scipy ]; then
    say "WARNING: not root or no apt-get, and no MUMPS found: Kwant falls back to SciPy's sparse"
    say "  solver, several times slower per sample (README, Set-up). The commands of the MUMPS"
    say "  routes follow at the end."
  fi
fi
if [ "$ROUTE" = conda ] && [ -n "$CONDA_INSTALL" ]; then
  say "installing Kwant from conda-forge into $CONDA_ENV"
  eval "$CONDA_INSTALL" || die "the conda install failed (command: $CONDA_INSTALL); install Kwant into $CONDA_ENV yourself and rerun"
fi

# ---- 3. virtual environment -----------------------------------------------------------------
base="plain"
[ "$ROUTE" = conda ] && base="conda:$CONDA_ENV"
if [ -x "$VENV/bin/python" ]; then
  was=$(cat "$VENV/.helisweep-base" 2>/dev/null || echo "")
  if [ -z "$was" ]; then  # made by an older set-up: always a plain venv
    grep -q '^include-system-site-packages *= *true' "$VENV/pyvenv.cfg" 2>/dev/null && was=unknown || was=plain
  fi
  [ "$was" = "$base" ] || die "$VENV was made for another install route ($was; now $base). It holds only installed packages: remove it (make clean-venv) and rerun, or set VENV=<another directory>"
else
  say "creating $VENV"
  if [ "$ROUTE" = conda ]; then
    "$BASE_PYTHON" -m venv --system-site-packages "$VENV"
  else
    "$PY" -m venv "$VENV"
  fi
fi
echo "$base" > "$VENV/.helisweep-base"

want=$( { cat "$constraints" pyproject.toml; echo "$ROUTE $base $MUMPS_LIBS"; [ -z "$build_conf" ] || cat "$build_conf"; } | sha256sum | cut -c1-16)
if [ "$mode" = install ] && [ -f "$stamp" ] && [ "$(cat "$stamp")" = "$want" ] \
   && "$VENV/bin/python" -c 'import kwant, pipeline, threadpoolctl' 2>/dev/null; then
  say "reusing $VENV (pins and route unchanged)"
  "$VENV/bin/python" -m pipeline.transport.environment
  advise
  exit 0
fi

pip=("$VENV/bin/python" -m pip --disable-pip-version-check -q)
"${pip[@]}" install -c "$constraints" pip

# ---- 4. Kwant -------------------------------------------------------------------------------
solver_of() {  # "<kwant version> <solver>" of the venv's Kwant, or "none none"
  "$VENV/bin/python" -c 'import kwant, kwant.solvers.default as d; print(kwant.__version__, "mumps" if type(d.smatrix.__self__).__module__.endswith("mumps") else "scipy")' 2>/dev/null || echo "none none"
}

build_kwant() {
  local tmp src
  tmp=$(mktemp -d "${TMPDIR:-/tmp}/helisweep-kwant.XXXXXX")
  "${pip[@]}" download --no-binary kwant --no-deps -d "$tmp" "kwant==$kwant_version"
  tar -xzf "$tmp/kwant-$kwant_version.tar.gz" -C "$tmp"
  src=$tmp/kwant-$kwant_version
  if [ -n "$build_conf" ]; then
    cp "$build_conf" "$src/build.conf"
    cp "$build_conf" "$VENV/kwant-build.conf"
  else
    rm -f "$VENV/kwant-build.conf"
  fi
  say "building Kwant $kwant_version from source (about 70-120 s)"
  # --cython regenerates Kwant's C files with the installed Cython 3 (setuptools passes
  # --build-option values to Kwant's setup.py); no build isolation: build against the pinned
  # NumPy and Cython installed above
  if ! "$VENV/bin/python" -m pip --disable-pip-version-check wheel -v --no-build-isolation --no-deps \
       -C--build-option=--cython -w "$tmp/dist" "$src" > "$VENV/kwant-build.log" 2>&1; then
    tail -n 40 "$VENV/kwant-build.log" >&2
    rm -rf "$tmp"
    die "the Kwant build failed (full log: $VENV/kwant-build.log)"
  fi
  grep -E '^ *(User-configured MUMPS|Auto-configured MUMPS|No MUMPS support|Caution: .*)$' "$VENV/kwant-build.log" \
    | sed 's/^ */[setup] Kwant build summary: /' || true
  "${pip[@]}" install --no-deps --force-reinstall "$tmp"/dist/kwant-*.whl
  rm -rf "$tmp"
  echo "$build_key" > "$VENV/.helisweep-kwant"
}

if [ "$ROUTE" = conda ]; then
  read -r have_version have_solver <<<"$(solver_of)"
  [ "$have_version" != none ] || die "the venv on $BASE_PYTHON does not see the conda environment's Kwant; remove $VENV (make clean-venv) and rerun"
  say "using the conda environment's Kwant $have_version (solver $have_solver); nothing is built"
else
  "${pip[@]}" install -c "$constraints" setuptools wheel cython numpy scipy tinyarray
  build_key="$ROUTE $kwant_version $( [ -z "$build_conf" ] && echo none || sha256sum < "$build_conf" | cut -c1-16)"
  read -r have_version have_solver <<<"$(solver_of)"
  had_key=$(cat "$VENV/.helisweep-kwant" 2>/dev/null || echo "")
  why=""
  if [ "$have_version" = none ]; then why="no Kwant in $VENV"
  elif [ "$have_version" != "$kwant_version" ]; then why="Kwant $have_version installed, $kwant_version pinned"
  elif [ "$EXPECT_MUMPS" = yes ] && [ "$have_solver" != mumps ]; then why="MUMPS is available now, the installed Kwant was built without it"
  elif [ -n "$had_key" ] && [ "$had_key" != "$build_key" ]; then why="the install route or build.conf changed"
  elif [ -z "$had_key" ] && [ "$ROUTE" = site-mumps ]; then why="the installed Kwant was not built with this build.conf"
  fi
  if [ -n "$why" ]; then
    say "Kwant needs a build: $why"
    build_kwant
  else
    [ -n "$had_key" ] || echo "$build_key" > "$VENV/.helisweep-kwant"
  fi
  read -r have_version have_solver <<<"$(solver_of)"
  [ "$have_version" = "$kwant_version" ] || die "Kwant $kwant_version is not importable after the build (see $VENV/kwant-build.log)"
  if [ "$EXPECT_MUMPS" = yes ] && [ "$have_solver" != mumps ]; then
    die "the route $ROUTE should give Kwant the MUMPS solver, but it has $have_solver (see $VENV/kwant-build.log)"
  fi
fi
if [ "$mode" = kwant ]; then
  say "Kwant $have_version in $VENV, solver $have_solver (--kwant-only: the package is not installed)"
  advise
  exit 0
fi

# ---- 5. this package ------------------------------------------------------------------------
if [ "$ROUTE" = conda ]; then
  # what the conda environment provides stays as conda installed it (its Kwant is built
  # against its NumPy): those pins are left out
  filtered=$(mktemp "${TMPDIR:-/tmp}/helisweep-constraints.XXXXXX")
  cp "$constraints" "$filtered"
  for name in $CONDA_PROVIDES; do
    pattern=$(printf '%s' "$name" | sed 's/[-_.]/[-_.]/g')
    grep -v -i -E "^${pattern}==" "$filtered" > "$filtered.new" || true
    mv "$filtered.new" "$filtered"
  done
  [ -z "$CONDA_PROVIDES" ] || say "left to the conda environment: $CONDA_PROVIDES"
  "${pip[@]}" install -c "$filtered" -e ".[test]"
  rm -f "$filtered"
else
  "${pip[@]}" install -c "$constraints" -e ".[test]"
fi
echo "$want" > "$stamp"

# ---- 6. report ------------------------------------------------------------------------------
"$VENV/bin/python" -m pipeline.transport.environment
advise
