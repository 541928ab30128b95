#!/usr/bin/env bash
# Installs everything gr-coherer needs on Debian 12 and prepares the project venv.
# Safe to re-run: each step is skipped when already done. Run as root or with sudo.
set -euo pipefail
cd "$(dirname "$0")/.."

DEBS=(gnuradio python3-numba python3-scipy python3-pytest python3-pytest-timeout
      python3-hypothesis python3-matplotlib python3-jsonschema python3-defusedxml
      python3-venv python3-pip gcc make cmake xvfb x11-apps)
missing=()
for pkg in "${DEBS[@]}"; do
  dpkg-query -W -f='${Status}' "$pkg" 2>/dev/null | grep -q "install ok installed" || missing+=("$pkg")
done
if ((${#missing[@]})); then
  SUDO=""
  [ "$(id -u)" -eq 0 ] || SUDO=sudo
  echo "bootstrap: installing Debian packages: ${missing[*]}" >&2
  $SUDO apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y -qq --no-install-recommends "${missing[@]}" >&2
fi

# Project venv on Debian's Python, seeing the system site packages (GNU Radio, numba, ...).
VENV=.venv
if [ ! -x "$VENV/bin/python" ]; then
  /usr/bin/python3 -m venv --system-site-packages "$VENV"
fi
if ! cmp -s requirements.txt "$VENV/.requirements.installed"; then
  echo "bootstrap: installing PyPI packages from requirements.txt" >&2
  "$VENV/bin/python" -m pip install -q --disable-pip-version-check -r requirements.txt >&2
  cp requirements.txt "$VENV/.requirements.installed"
fi

# Source-tree import: <shim>/gnuradio/coherer -> python/coherer, shim on the venv's path.
SHIM="$PWD/$VENV/shim"
mkdir -p "$SHIM/gnuradio"
ln -sfn "$PWD/python/coherer" "$SHIM/gnuradio/coherer"
SITE=$("$VENV/bin/python" -c 'import sysconfig; print(sysconfig.get_paths()["purelib"])')
echo "$SHIM" > "$SITE/gr-coherer-source.pth"

# The `coherer` command inside the venv.
cat > "$VENV/bin/coherer" <<SH
#!/bin/sh
exec "$PWD/$VENV/bin/python" -m gnuradio.coherer "\$@"
SH
chmod +x "$VENV/bin/coherer"

# Compile the numba signal kernels now, into the cache the source tree loads them from
# (python/coherer/__pycache__), so that no command stops to compile on its first run.
# Quick when they are already compiled; a few minutes on a fresh checkout.
"$VENV/bin/python" -m gnuradio.coherer._warmup
