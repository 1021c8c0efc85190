#!/usr/bin/env bash
# test.sh is the CI hook of the Python client: it installs the Debian
# packages it needs if they are missing, generates the stubs from the
# current .proto files (gen.sh) and runs the tests with Debian's Python,
# which build and start a real reckond (so Go must be on PATH). unittest's
# closing lines ("Ran N tests", then "OK" or "FAILED (...)") say how it went;
# the exit status is unittest's.
#
# Usage: clients/python/test.sh [unittest arguments, e.g. -v]
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
root="$(cd "$here/../.." && pwd)"
export PATH="/usr/local/go/bin:${PATH}"

packages=(python3-grpcio python3-protobuf protobuf-compiler protobuf-compiler-grpc openssl)
missing=()
for p in "${packages[@]}"; do
	if ! dpkg-query -W -f '${Status}' "$p" 2>/dev/null | grep -q 'install ok installed'; then
		missing+=("$p")
	fi
done
if [ "${#missing[@]}" -gt 0 ]; then
	echo "python: installing ${missing[*]}"
	apt-get update -q && apt-get install -y -q "${missing[@]}"
fi

"$here/gen.sh"
cd "$root"
exec /usr/bin/python3 -m unittest discover "$@" clients/python/tests
