"""File-name forms of site labels: safe on every common file system and distinct for distinct labels.

Every per-site output (``predictions_<name>.nc``, ``maps_<name>/``, ``variogram_check_<name>.*``,
the per-site folders of ``explore``) is named by :func:`site_file_name`. A label made only of
ASCII letters, digits, ``_``, ``-`` and inner ``.`` (at most 64 characters) is used as it is.
Any other label becomes its safe part followed by ``+`` and 8 hex digits of the SHA-256 of the
label: ``a/b`` -> ``a_b+<hash>`` while ``a_b`` stays ``a_b``. As a label used as it is never
contains ``+``, two labels give the same name only if their hashes collide (about 1 in 4e9 per
pair of labels with the same safe part). Labels that differ only in letter case are refused at
intake (:mod:`bayesgeo.data.points`), because Windows and macOS file systems do not tell their files apart.
The label itself is recorded inside each per-site file (NetCDF attribute ``site``, a ``site``
column in CSV tables, the figure titles).
"""

from __future__ import annotations

import hashlib
import re

__all__ = ["site_file_name"]

_SAFE = re.compile(r"[A-Za-z0-9_-](?:[A-Za-z0-9_.-]{0,62}[A-Za-z0-9_-])?")
# Names Windows reserves for devices, whatever the extension.
_RESERVED = {"con", "prn", "aux", "nul", *(f"com{i}" for i in range(10)), *(f"lpt{i}" for i in range(10))}


def site_file_name(label: str) -> str:
    """The file-name form of site ``label`` (see the module docstring).

    Examples
    --------
    >>> site_file_name("north-yard")
    'north-yard'
    >>> site_file_name("a/b") != site_file_name("a_b")
    True
    """
    label = str(label)
    if _SAFE.fullmatch(label) and label.lower() not in _RESERVED:
        return label
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "_", label).strip("._")[:40] or "site"
    return f"{safe}+{hashlib.sha256(label.encode('utf-8')).hexdigest()[:8]}"
