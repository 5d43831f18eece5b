#!/usr/bin/env bash
# CI step: the README's two set-up commands, in the README's order, in a fresh plain virtual
# environment and a temporary clone (the work tree is untouched); then the CLI and every node
# module must still start from another directory. Guards against an install that the first
# command's run leaves broken for the second (e.g. cache files inside site-packages that shadow
# the later editable install).
#
# The commands are read from the README's "Set up" section, so they cannot drift apart. The second
# one ends with the test run, which .ci/run already does in the work tree; here it stops after the
# install, so the suite does not run twice. Dependencies come from the configured package index.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
python="${PYTHON:-python}"
export DEBIAN_FRONTEND=noninteractive
# Fresh means nothing of the calling environment's packages leaks in.
unset PYTHONPATH PYTHONHOME

work="$(mktemp -d "${TMPDIR:-/tmp}/fresh-venv.XXXXXX")"
trap 'rm -rf "$work"' EXIT

readarray -t setup_commands < <("$python" - "$root/README.md" <<'EOF'
import re, sys
text = open(sys.argv[1], encoding="utf-8").read()
section = re.search(r"^## Set up\n(.*?)(?=^## )", text, re.S | re.M)
if section is None:
    sys.exit("README.md: no '## Set up' section")
blocks = re.findall(r"```bash\n(.*?)\n```", section.group(1), re.S)
if len(blocks) != 2 or any("\n" in b for b in blocks):
    sys.exit(f"README.md 'Set up': expected two one-line bash commands, found {blocks!r}")
print("\n".join(blocks))
EOF
)
install_command="${setup_commands[0]}"
test_suffix=" && python -m pytest -q"
if [[ "${setup_commands[1]}" != *"$test_suffix" ]]; then
    echo "fresh_venv.sh: README's second set-up command no longer ends with '$test_suffix'" >&2
    exit 1
fi
test_install_command="${setup_commands[1]%"$test_suffix"}"

git -c advice.detachedHead=false clone --quiet "$root" "$work/src"
if ! "$python" -m venv "$work/venv" 2>/dev/null; then
    # Debian's Python ships venv's pip bootstrap as a separate package.
    apt-get update -qq && apt-get install -y -qq python3-venv >/dev/null
    rm -rf "$work/venv"
    "$python" -m venv "$work/venv"
fi
# shellcheck disable=SC1091
source "$work/venv/bin/activate"
# The tour's store goes to the temporary directory, not the CI user's data directory.
export XDG_DATA_HOME="$work/data"

cd "$work/src"
echo "fresh_venv.sh: $install_command"
bash -euo pipefail -c "$install_command"
echo "fresh_venv.sh: $test_install_command"
bash -euo pipefail -c "$test_install_command"

cd "$work"
compliant-demo --version
python - <<'EOF'
import importlib
import pkgutil
from importlib.metadata import entry_points

import compliant_demo.nodes

nodes = [m.name for m in pkgutil.iter_modules(compliant_demo.nodes.__path__, "compliant_demo.nodes.")]
for name in nodes:
    importlib.import_module(name)
scripts = [ep for ep in entry_points(group="console_scripts") if ep.value.startswith("compliant_demo")]
for ep in scripts:
    ep.load()
print(f"fresh_venv.sh: imported {len(nodes)} node modules, loaded {len(scripts)} executables")
EOF
