"""Configuration parsing and validation: every refusal names the key and what to do."""

from __future__ import annotations

import pytest

from eigenstream.config import Config, apply_overrides, load_config
from eigenstream.errors import ConfigError


def write(tmp_path, text: str):
    path = tmp_path / "cfg.toml"
    path.write_text(text)
    return path


def test_defaults_and_relative_paths(tmp_path):
    cfg = load_config(write(tmp_path, '[input]\npath = "rows.npy"\n'))
    assert cfg.input.path == str((tmp_path / "rows.npy").resolve())
    assert cfg.run.workdir == str((tmp_path / "eigenstream-work").resolve())
    assert cfg.graph.neighbors == 15 and cfg.graph.metric == "euclidean"
    assert cfg.kernel.bandwidth == "adaptive" and cfg.kernel.bandwidth_neighbor == 7
    assert cfg.kernel.alpha == 1.0 and cfg.embedding.components == 2
    assert cfg.input.resolved_format == "npy"


def test_round_trip_is_lossless(tmp_path):
    cfg = load_config(write(tmp_path, '[input]\npath = "a.csv"\ncolumns = ["x", "y"]\n'
                                      '[kernel]\nbandwidth = 0.5\n'))
    again = Config.from_dict(cfg.to_dict())
    assert again == cfg


@pytest.mark.parametrize(
    ("text", "words"),
    [
        ('[input]\npath = "a.npy"\n[graph]\nneighbours = 5\n', ["[graph] neighbours", "neighbors"]),
        ('[input]\npath = "a.npy"\n[grpah]\n', ["[grpah]", "graph"]),
        ('[input]\npath = "a.npy"\n[graph]\nneighbors = 0\n', ["[graph] neighbors", ">= 1", "0"]),
        ('[input]\npath = "a.npy"\n[graph]\nneighbors = "ten"\n', ["[graph] neighbors", "'ten'"]),
        ('[input]\npath = "a.npy"\n[kernel]\nalpha = 1.5\n', ["[kernel] alpha", "[0.0, 1.0]"]),
        ('[input]\npath = "a.npy"\n[kernel]\nbandwidth = -1\n', ["[kernel] bandwidth", "positive"]),
        ('[input]\npath = "a.npy"\n[embedding]\ndiffusion_time = -1\n', ["diffusion_time"]),
        ('[input]\npath = "a.npy"\n[embedding]\ncomponents = 0\n', ["[embedding] components"]),
        ('[input]\npath = "a.npy"\n[graph]\nmetric = "manhattan"\n', ["[graph] metric", "cosine"]),
        ('[graph]\nneighbors = 5\n', ["[input]", "path"]),
        ('[input]\npath = "a.npy"\n[graph]\nneighbors = 5\n', ["bandwidth_neighbor", "neighbors"]),
        ('[input]\npath = "a.npy"\n[graph]\nsearch_threads = -1\n',
         ["[graph] search_threads", ">= 0"]),
        ('[input]\npath = "a.npy"\n[embedding]\nchoose_from = 2\n',
         ["[embedding] choose_from", "0 (the leading eigenvectors)", "[3, 30]", "2"]),
        ('[input]\npath = "a.npy"\n[embedding]\nchoose_from = true\n',
         ["[embedding] choose_from", "True"]),
        ('[input]\npath = "a.npy"\n[cluster]\nprocesses = "sometimes"\n',
         ["[cluster] processes", '"auto"', "sometimes"]),
        ("[input\n", ["not valid TOML"]),
    ],
)
def test_bad_values_are_refused_with_the_key_named(tmp_path, text, words):
    with pytest.raises(ConfigError) as info:
        load_config(write(tmp_path, text))
    message = str(info.value)
    assert "\n" not in message
    for word in words:
        assert word in message


@pytest.mark.parametrize(
    ("extra", "processes"),
    [
        ("", False),  # full graph: thread workers
        ("[landmarks]\ncount = 500\n", True),  # landmark mode: worker processes
        ("[cluster]\nprocesses = true\n", True),  # an explicit choice is kept
        ("[landmarks]\ncount = 500\n[cluster]\nprocesses = false\n", False),
    ],
)
def test_local_worker_kind_follows_the_mode_unless_set(tmp_path, extra, processes):
    cfg = load_config(write(tmp_path, '[input]\npath = "a.npy"\n' + extra))
    assert cfg.cluster.processes is processes


def test_unknown_suffix_names_the_option(tmp_path):
    cfg = load_config(write(tmp_path, '[input]\npath = "rows.xyz"\n'))
    with pytest.raises(ConfigError, match=r"\[input\] format"):
        _ = cfg.input.resolved_format


def test_overrides_parse_toml_literals_and_refuse_unknown_keys():
    data = {"input": {"path": "a.npy"}}
    merged = apply_overrides(data, ["graph.neighbors=10", "graph.metric=cosine", "kernel.alpha=0.5"])
    assert merged["graph"] == {"neighbors": 10, "metric": "cosine"}
    assert merged["kernel"]["alpha"] == 0.5
    assert data == {"input": {"path": "a.npy"}}
    with pytest.raises(ConfigError, match="Did you mean `neighbors`"):
        apply_overrides(data, ["graph.neighbor=3"])
    with pytest.raises(ConfigError, match="section.key=value"):
        apply_overrides(data, ["neighbors=3"])


def test_missing_config_file(tmp_path):
    with pytest.raises(ConfigError, match="not found"):
        load_config(tmp_path / "nope.toml")


def test_memory_limit_refuses_a_run_that_cannot_fit_with_the_figure(tmp_path):
    # 2M rows x 50 columns in full-graph mode needs several GiB by our estimate; the refusal
    # names the figure, the limit and what to change (issue: "refuses up front, with a figure").
    from eigenstream import budget

    cfg = load_config(write(tmp_path, '[input]\npath = "a.npy"\n[run]\nmemory_limit = "1GiB"\n'))
    with pytest.raises(ConfigError, match=r"needs about .* GiB .*memory_limit.* 1.00 GiB.*landmarks"):
        budget.check(cfg, 2_000_000, 50)
    small = load_config(write(tmp_path, '[input]\npath = "a.npy"\n[run]\nmemory_limit = "1GiB"\n'
                                        "[landmarks]\ncount = 20000\n"))
    budget.check(small, 2_000_000, 50)  # landmark mode fits: bounded by m, not n
    with pytest.raises(ConfigError, match="memory_limit"):
        load_config(write(tmp_path, '[input]\npath = "a.npy"\n[run]\nmemory_limit = "lots"\n'))


def test_search_threads_auto_is_every_local_thread_and_one_worker_elsewhere():
    # Our own rule (stages/neighbors.search_threads), written out per cluster kind.
    import os

    from eigenstream.cluster import local_worker_count
    from eigenstream.stages.neighbors import search_threads

    def cfg(graph=None, cluster=None):
        return Config.from_dict({"input": {"path": "a.npy"}, "graph": graph or {},
                                 "cluster": cluster or {}})

    local = cfg(cluster={"workers": 3, "threads_per_worker": 2})
    assert local_worker_count(local.cluster) == 3
    assert search_threads(local) == 6
    default = cfg()
    assert search_threads(default) == max(1, min(4, os.cpu_count() or 1))
    assert search_threads(cfg(graph={"search_threads": 5})) == 5
    remote = cfg(cluster={"kind": "address", "address": "tcp://10.0.0.1:8786",
                          "threads_per_worker": 4})
    assert search_threads(remote) == 4
