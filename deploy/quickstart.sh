#!/bin/sh
# beamtap quick start: set up everything on a fresh Debian/Ubuntu machine, then
#   sh deploy/quickstart.sh demo   run the live demo (service + terminal view)
#   sh deploy/quickstart.sh test   run the whole test suite
# It creates .venv/ in the repository, installs the Python packages into it,
# and installs the system packages it needs with apt-get when it can (as root,
# or through passwordless sudo); otherwise it prints the one line to run.
set -eu
cd "$(dirname "$0")/.."
what="${1:-demo}"
case "$what" in demo|test|setup) ;; *) echo "usage: sh deploy/quickstart.sh demo|test|setup" >&2; exit 2;; esac

# System packages: PortAudio for the sound card, a C compiler and Python's
# headers for the engine's compiled kernels; for the tests also the ALSA
# plugins and JACK (virtual sound cards), libzmq/msgpack-c (the
# second-language subscriber example), and Chromium with its driver and
# openssl (the browser view's tests).
runtime_pkgs="libportaudio2 python3-venv gcc libc6-dev python3-dev"
test_pkgs="libasound2-plugins jackd2 alsa-utils libzmq3-dev libmsgpack-dev pkg-config chromium chromium-driver openssl"
pkgs="$runtime_pkgs"
[ "$what" = test ] && pkgs="$pkgs $test_pkgs"

missing=""
for p in $pkgs; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing="$missing $p"
done
if [ -n "$missing" ]; then
  if command -v apt-get >/dev/null 2>&1; then
    if [ "$(id -u)" = 0 ]; then SUDO=""; elif sudo -n true 2>/dev/null; then SUDO="sudo -n"; else SUDO=none; fi
    if [ "$SUDO" = none ]; then
      echo "quickstart: please install system packages first: sudo apt-get install$missing" >&2
    else
      echo "quickstart: installing system packages:$missing"
      $SUDO apt-get update -qq
      DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq $missing >/dev/null
    fi
  else
    echo "quickstart: not a Debian/Ubuntu system; install PortAudio (and for tests ALSA plugins, JACK, libzmq, msgpack-c) yourself:$missing" >&2
  fi
fi

py="${PYTHON:-python3}"
if [ ! -x .venv/bin/python ]; then
  "$py" -m venv .venv
fi
stamp=.venv/.beamtap-installed
if [ ! -f "$stamp" ] || [ pyproject.toml -nt "$stamp" ]; then
  .venv/bin/python -m pip install -q --upgrade pip
  .venv/bin/python -m pip install -q -e '.[test]'
  touch "$stamp"
fi

case "$what" in
  demo) exec .venv/bin/beamtap demo ;;
  test) shift; exec .venv/bin/python -m pytest "$@" ;;
  setup) echo "quickstart: ready; activate with '. .venv/bin/activate'" ;;
esac
