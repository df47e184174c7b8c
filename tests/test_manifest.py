"""Tests of run manifests: hashes, versions, platform, times."""

from __future__ import annotations

import hashlib
import importlib.metadata as md
import json
import re

from bayesgeo.study.manifest import file_table, new_manifest, sha256_file, utc_now, versions


def test_sha256_published_vectors(tmp_path):
    """SHA-256 test vectors from FIPS 180-2 Appendix B ("abc" -> ba7816bf...; the empty string from
    NIST's example values, e3b0c442...): values from memory, also checked against hashlib."""
    p = tmp_path / "abc.txt"
    p.write_bytes(b"abc")
    assert sha256_file(p) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    e = tmp_path / "empty"
    e.write_bytes(b"")
    assert sha256_file(e) == "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
    big = tmp_path / "big.bin"
    data = bytes(range(256)) * 9000  # several read chunks
    big.write_bytes(data)
    assert sha256_file(big, chunk=4096) == hashlib.sha256(data).hexdigest()


def test_file_table_lists_every_file(tmp_path):
    """Every file under the folder with its size and hash (hashlib reference), sorted, excluding named ones."""
    (tmp_path / "a").mkdir()
    (tmp_path / "a" / "x.csv").write_text("1,2\n")
    (tmp_path / "m.json").write_text("{}")
    (tmp_path / "r.html").write_text("<p>")
    t = file_table(tmp_path, exclude=("m.json",))
    assert list(t) == ["a/x.csv", "r.html"]
    assert t["a/x.csv"] == {"sha256": hashlib.sha256(b"1,2\n").hexdigest(), "bytes": 4}


def test_versions_match_installed_metadata():
    """Versions come from the installed distributions (importlib.metadata is the reference)."""
    v = versions(("numpy", "scipy", "no-such-distribution-xyz"))
    assert v["numpy"] == md.version("numpy") and v["scipy"] == md.version("scipy")
    assert v["no-such-distribution-xyz"] is None
    assert re.fullmatch(r"\d+\.\d+\.\d+.*", v["python"])


def test_new_manifest_contents(tmp_path):
    """The manifest records input hashes, study text, seeds, command line, times, and is JSON."""
    study = tmp_path / "s.toml"
    study.write_text("[data]\npath = 'd.csv'\n")
    data = tmp_path / "d.csv"
    data.write_text("x,y,v\n")
    settings = {"sampler": {"seed": 7}, "explore": {"seed": 1}, "check": {"seed": 2}, "prediction": {"seed": 3}}
    m = new_manifest(study_path=study, study_text=study.read_text(), settings=settings, inputs=[study, data],
                     argv=["bayesgeo", "run", "s.toml"])
    assert m["inputs"][str(data)]["sha256"] == hashlib.sha256(b"x,y,v\n").hexdigest()
    assert m["study"]["text"] == study.read_text()
    assert m["seeds"] == {"sampler": 7, "explore": 1, "check": 2, "prediction": 3}
    assert m["command_line"] == ["bayesgeo", "run", "s.toml"]
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", m["started"]) and m["finished"] is None
    assert "pymc" in m["versions"] and "cpu_count" in m["platform"]
    json.dumps(m)
    assert utc_now() >= m["started"]
