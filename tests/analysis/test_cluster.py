"""The cluster file: layout, defaults and one-line errors."""

from __future__ import annotations

from pathlib import Path

import pytest

from watchtower.cluster import Cluster, ClusterConfigError, load_cluster

GOOD = """
[job]
name = "pretrain"
total_steps = 5000
ranks_per_node = 4

[network]
nic_Bps = 12.5e9

[network.nodes]
slow01 = 3.125e9

[groups]
rack-a = ["a01", "a02", "slow01"]
rack-b = ["b01"]
"""


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "cluster.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_load_good_file(tmp_path: Path) -> None:
    c = load_cluster(_write(tmp_path, GOOD))
    assert (c.name, c.total_steps, c.ranks_per_node) == ("pretrain", 5000, 4)
    assert c.nominal_Bps("a01") == 12.5e9
    assert c.link_nominal_Bps("a01", "slow01") == 3.125e9  # the slower NIC limits the link
    assert c.link_class("a01", "a02") == "rack-a"
    assert c.link_class("b01", "a01") == c.link_class("a01", "b01") == "rack-a|rack-b"
    assert c.link_class("x", "y") == ""  # nodes in no group


def test_empty_file_is_default(tmp_path: Path) -> None:
    c = load_cluster(_write(tmp_path, ""))
    assert c == Cluster.default()
    assert c.total_steps is None and c.link_nominal_Bps("a", "b") is None


@pytest.mark.parametrize(("text", "fragment"), [
    ("[job\nname = 1", "bad TOML"),
    ("[job]\ntotal_steps = -3", "job.total_steps"),
    ("[job]\ntotal_steps = true", "job.total_steps"),
    ("[network]\nnic_Bps = 'fast'", "network.nic_Bps"),
    ("[network.nodes]\nn1 = 0", "network.nodes.n1"),
    ("[job]\nnmae = 'x'", "unknown key job.nmae"),
    ("[groups]\nr1 = ['a']\nr2 = ['a']", "node 'a'"),
    ("job = 3", "job must be a table"),
])
def test_bad_files_raise_one_line(tmp_path: Path, text: str, fragment: str) -> None:
    path = _write(tmp_path, text)
    with pytest.raises(ClusterConfigError) as info:
        load_cluster(path)
    message = str(info.value)
    assert isinstance(info.value, ValueError)
    assert "\n" not in message and fragment in message and str(path) in message


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(ClusterConfigError, match="cannot read"):
        load_cluster(tmp_path / "absent.toml")
