#!/usr/bin/env bash
# Everything the test suite needs, installed only where it is missing, on a Debian machine:
#
#   1. system tools (apt-get, as root or through password-less sudo):
#      python3 (3.11+) with venv, Java and Maven (the suite's Kafka broker, from Maven Central jars),
#      kcat (an independent Kafka client), Prometheus (promtool, and a server that scrapes us),
#      openssl (a throw-away CA for the TLS tests), Chromium and a font for it (renders the report);
#   2. .venv with the project installed editable with its test extra ('.[test]').
#
# Then the caller runs the suite. The README's test command, from the repository root:
#
#   bash tests/setup.sh && .venv/bin/python -m pytest
#
# On a machine that has everything it installs nothing: apt is not touched when every tool is
# found, and pip is skipped when .venv already holds this checkout installed editable from the
# current pyproject.toml (.venv/casecloud-setup.json records its SHA-256 after each install) with
# every requirement present. When something is missing and cannot be installed here (no apt-get,
# not root and no password-less sudo, too old a Python), it stops with one line on stderr naming
# what is missing and how to get it, and exits 1 before any test runs.
set -euo pipefail
cd "$(dirname "$0")/.."

me="tests/setup.sh"
say() { printf '%s: %s\n' "$me" "$*"; }
stop() { printf '%s: %s\n' "$me" "$*" >&2; exit 1; }

# --- 1. system tools ----------------------------------------------------------------------------
packages=()   # Debian packages to install
missing=()    # what is missing, for the message
need() {      # need WHAT PACKAGE...: WHAT is missing, PACKAGE(s) provide it
  missing+=("$1"); shift
  local p q
  for p in "$@"; do
    for q in "${packages[@]+"${packages[@]}"}"; do [ "$q" = "$p" ] && continue 2; done
    packages+=("$p")
  done
}
have() { command -v "$1" >/dev/null 2>&1; }

check_tools() {
  packages=(); missing=()
  if ! have python3; then
    need python3 python3 python3-venv
  elif ! python3 -c 'import ensurepip, venv' >/dev/null 2>&1; then
    need "python3 venv module" python3-venv
  fi
  have java || need java default-jre-headless
  have mvn || need mvn maven
  have kcat || need kcat kcat
  have promtool || need promtool prometheus
  have prometheus || need prometheus prometheus
  have openssl || need openssl openssl
  [ -x /usr/bin/chromium ] || have chromium || need chromium chromium
  [ -d /usr/share/fonts/truetype/liberation ] || need "Liberation fonts" fonts-liberation
}

check_tools
if [ ${#packages[@]} -gt 0 ]; then
  how="apt-get install -y ${packages[*]}"
  if ! have apt-get; then
    stop "missing ${missing[*]}; no apt-get on PATH to install with: run \`$how\` as root (Debian), or use your system's package manager, then run again"
  fi
  apt=(env DEBIAN_FRONTEND=noninteractive apt-get -q)
  if [ "$(id -u)" != 0 ]; then
    have sudo && sudo -n true >/dev/null 2>&1 \
      || stop "missing ${missing[*]}; not root and no password-less sudo: run \`sudo $how\` (or as root), then run again"
    apt=(sudo -n "${apt[@]}")
  fi
  say "installing ${packages[*]} (missing: ${missing[*]})"
  "${apt[@]}" update && "${apt[@]}" install -y --no-install-recommends "${packages[@]}" \
    || stop "\`$how\` failed (see apt's messages above); fix that, then run again"
  check_tools
  [ ${#missing[@]} -eq 0 ] || stop "still missing after \`$how\`: ${missing[*]}; install them by hand, then run again"
fi
python3 -c 'import sys; sys.exit(sys.version_info < (3, 11))' \
  || stop "python3 is $(python3 -c 'import sys; print("%d.%d" % sys.version_info[:2])'); casecloud needs Python 3.11 or later: install it (e.g. \`apt-get install -y python3.11 python3.11-venv\`), then run again"

# --- 2. the venv ----------------------------------------------------------------------------------
if ! .venv/bin/python -c '' >/dev/null 2>&1; then
  say "creating .venv"
  python3 -m venv --clear .venv
fi

# Up to date when the stamp matches this pyproject.toml and checkout, casecloud is installed
# editable from here, and every requirement (with the test extra) is present.
stamp_check='
import hashlib, json, pathlib, re, sys
from importlib import metadata
root = pathlib.Path.cwd().resolve()
want = {"pyproject_sha256": hashlib.sha256((root / "pyproject.toml").read_bytes()).hexdigest(), "root": str(root)}
stamp = pathlib.Path(sys.prefix) / "casecloud-setup.json"
if sys.argv[1:] == ["write"]:
    stamp.write_text(json.dumps(want, indent=1) + "\n")
    sys.exit(0)
try:
    if json.loads(stamp.read_text()) != want:
        sys.exit(1)
    dist = metadata.distribution("casecloud")
    url = json.loads(dist.read_text("direct_url.json") or "{}")
    if not (url.get("dir_info", {}).get("editable") and url.get("url") == root.as_uri()):
        sys.exit(1)
    for req in dist.requires or []:
        if "extra ==" in req and "extra == \"test\"" not in req:
            continue
        metadata.version(re.split(r"[\s<>=!~;\[(]", req, maxsplit=1)[0])
except (OSError, ValueError, metadata.PackageNotFoundError):
    sys.exit(1)
'
if .venv/bin/python -I -c "$stamp_check" check; then
  say "system tools present; .venv up to date"
else
  say "installing casecloud with its test extra into .venv"
  .venv/bin/python -m pip install -e '.[test]'
  .venv/bin/python -I -c "$stamp_check" write
fi
