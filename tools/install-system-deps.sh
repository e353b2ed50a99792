#!/usr/bin/env bash
# Install the system packages the tests and benchmarks need, where we can (root + apt).
# Without root or apt, say what is missing; the tests that need it then skip with the
# reason (or fail, under CI=true).
set -uo pipefail
PKGS=(sox libportaudio2 jackd2 chromium)  # chromium: the browser tests (Playwright drives it; never "playwright install")
missing=()
for p in "${PKGS[@]}"; do
  dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q "install ok installed" || missing+=("$p")
done
[ ${#missing[@]} -eq 0 ] && exit 0
if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
  echo "install-system-deps: installing ${missing[*]}" >&2
  if [ -z "${FIELDMIX_APT_UPDATED:-}" ]; then
    apt-get update -qq >/dev/null 2>&1 || echo "install-system-deps: apt-get update failed" >&2
  fi
  DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${missing[@]}" >/dev/null \
    || echo "install-system-deps: could not install ${missing[*]}" >&2
else
  echo "install-system-deps: not root or no apt; missing: ${missing[*]} (tests needing them will skip)" >&2
fi
exit 0
