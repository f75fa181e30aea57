#!/usr/bin/env bash
# Set up mapkit in ./.venv (idempotent) and run the demo or the whole test suite.
#
#   bash scripts/run.sh demo [mapkit demo options]   # main job on the bundled sample map
#   bash scripts/run.sh test [pytest options]        # every test, GUI tests under Xvfb
#
# Needs Python >= 3.11 and, for the tests, apt-get (run as root or with sudo) to add
# Xvfb, Mesa OpenGL and the Qt system libraries when they are missing.
set -euo pipefail
cd "$(dirname "$0")/.."
what=${1:-demo}
shift || true

PY=${PYTHON:-python3}
if ! "$PY" -c 'import sys; sys.exit(sys.version_info < (3, 11))' 2>/dev/null; then
    echo "mapkit needs Python >= 3.11; set PYTHON=/path/to/python3.11" >&2
    exit 2
fi

SUDO=""
if [ "$(id -u)" != 0 ] && command -v sudo >/dev/null; then SUDO="sudo"; fi
apt_install() {
    export DEBIAN_FRONTEND=noninteractive
    $SUDO apt-get update -qq
    $SUDO apt-get install -y -qq --no-install-recommends "$@" >/dev/null
}

# system libraries for napari's Qt/OpenGL viewer under a virtual X display
GUI_DEBS="xvfb xauth libgl1 libegl1 libgl1-mesa-dri libglib2.0-0 libfontconfig1 libdbus-1-3 \
libxkbcommon-x11-0 libxcb-cursor0 libxcb-icccm4 libxcb-image0 libxcb-keysyms1 libxcb-randr0 \
libxcb-render-util0 libxcb-shape0 libxcb-xfixes0 libxcb-xinerama0"

if [ ! -x .venv/bin/python ]; then
    if ! "$PY" -m venv .venv 2>/dev/null; then
        rm -rf .venv
        apt_install python3-venv
        "$PY" -m venv .venv
    fi
fi
PIP=(.venv/bin/python -m pip install -q --disable-pip-version-check)

case "$what" in
    demo)
        "${PIP[@]}" -e .
        exec .venv/bin/mapkit demo "$@"
        ;;
    test)
        missing=""
        for deb in $GUI_DEBS; do
            dpkg -s "$deb" >/dev/null 2>&1 || missing="$missing $deb"
        done
        if [ -n "$missing" ]; then
            echo "installing system packages:$missing"
            # shellcheck disable=SC2086
            apt_install $missing
        fi
        "${PIP[@]}" -e ".[test]" -e plugins
        # napari's viewer needs a real OpenGL context: a virtual X display, not offscreen Qt
        exec xvfb-run -a -s "-screen 0 1400x900x24" .venv/bin/python -m pytest "$@"
        ;;
    *)
        echo "usage: bash scripts/run.sh demo|test [options]" >&2
        exit 2
        ;;
esac
