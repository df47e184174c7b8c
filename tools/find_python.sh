#!/bin/sh
# Print the path of a Python >= 3.12 found on this machine. Order: python3.12 (the version the
# project is tested on), python3.13, python3, then versions installed under pyenv (3.12 first).
# Exits 1 with a message when there is none.
ok() { "$1" -c 'import sys; sys.exit(0 if sys.version_info >= (3, 12) else 1)' 2>/dev/null; }
for cand in python3.12 python3.13 python3; do
    p=$(command -v "$cand" 2>/dev/null) || continue
    if ok "$p"; then echo "$p"; exit 0; fi
done
root=${PYENV_ROOT:-$HOME/.pyenv}
for p in $(ls -d "$root"/versions/3.12*/bin/python3 "$root"/versions/3.1[3-9]*/bin/python3 2>/dev/null); do
    if ok "$p"; then echo "$p"; exit 0; fi
done
echo "no Python >= 3.12 found (looked for python3.12, python3.13, python3 and under $root/versions)" >&2
exit 1
