#!/usr/bin/env bash
# Install test needs on a fresh Debian machine and run every test: the core suite without Qt, then the napari
# suite under a virtual X display with Mesa software OpenGL.
set -euo pipefail
cd "$(dirname "$0")/.."
export DEBIAN_FRONTEND=noninteractive
missing=$(xargs -a .ci/apt-packages.txt -n1 sh -c 'dpkg -s "$0" >/dev/null 2>&1 || echo "$0"')
if [ -n "$missing" ]; then
  SUDO=""; [ "$(id -u)" -ne 0 ] && SUDO="sudo"
  $SUDO apt-get update -qq
  # shellcheck disable=SC2086
  $SUDO apt-get install -y -qq --no-install-recommends $missing >/dev/null
fi
python3 -m pip install -q -e ".[napari,test]"
export QT_API=pyside6
# Core suite: napari's pytest plugin is switched off so no Qt is imported.
python3 -m pytest -p no:napari tests --ignore=tests/napari -q
# GUI suite under Xvfb.
xvfb-run -a -s "-screen 0 1600x1200x24" python3 -m pytest tests/napari -q
