#!/usr/bin/env bash
# Set up and run, on a fresh Debian machine with Python 3.11 (no GPU needed).
#   ./dev.sh demo   install, then run the demo scenario end to end
#   ./dev.sh test   install with the test extras (and, as root, Debian's chromium, Xvfb and
#                   Mesa for the browser and napari tests), then run the whole test suite
#   ./dev.sh bench  install, then run the benchmarks under tests/benchmarks/
# The virtual environment lives in .venv (override with UNMIX_VENV).
set -euo pipefail
cd "$(dirname "$0")"
task=${1:-}
venv=${UNMIX_VENV:-.venv}

python=""
for candidate in python3.11 python3; do
    if command -v "$candidate" >/dev/null 2>&1; then python=$candidate; break; fi
done
if [ -z "$python" ] || ! "$python" -c 'import venv, ensurepip' >/dev/null 2>&1; then
    # Debian splits venv/ensurepip out of the interpreter package.
    if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then
        apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq python3 python3-venv python3-pip >/dev/null
        python=${python:-python3}
    else
        echo "error: need Python 3.11 with the venv module (Debian: apt-get install python3-venv)" >&2
        exit 2
    fi
fi

setup() {
    if [ ! -x "$venv/bin/python" ]; then
        "$python" -m venv "$venv"
    fi
    "$venv/bin/python" -m pip install --quiet --upgrade pip
    "$venv/bin/python" -m pip install --quiet -e ".$1"
}

case "$task" in
    demo)
        setup ""
        "$venv/bin/unmix" demo -o "${2:-unmix-demo}"
        ;;
    test)
        setup "[test]"
        if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1 \
                && ! { command -v chromium && command -v xvfb-run; } >/dev/null 2>&1; then
            # The report is checked in a real browser (Debian's headless Chromium) and the napari
            # plugin in a real viewer on a virtual screen (Xvfb, Mesa OpenGL, Qt's X11 libraries).
            apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium xvfb xauth \
                libgl1-mesa-dri libglx-mesa0 libegl1 libxkbcommon-x11-0 libxcb-icccm4 libxcb-image0 \
                libxcb-keysyms1 libxcb-randr0 libxcb-render-util0 libxcb-xinerama0 libxcb-xfixes0 \
                libxcb-shape0 libxcb-cursor0 libdbus-1-3 libfontconfig1 >/dev/null
        fi
        shift
        display=()
        if [ -z "${DISPLAY:-}" ] && command -v xvfb-run >/dev/null 2>&1; then
            display=(xvfb-run -a -s "-screen 0 1600x1200x24")  # no screen: a virtual one for napari
        fi
        set +e
        "${display[@]}" "$venv/bin/python" -m pytest "$@"
        status=$?
        set -e
        if [ "$status" = 5 ]; then
            echo "error: pytest collected no tests" >&2
            exit 1
        fi
        exit "$status"
        ;;
    bench)
        setup "[test]"
        for script in tests/benchmarks/bench_*.py; do
            "$venv/bin/python" "$script"
        done
        ;;
    *)
        echo "usage: ./dev.sh demo|test|bench" >&2
        exit 2
        ;;
esac
