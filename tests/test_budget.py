"""The memory budget: row blocks sized from `[run] memory_limit`, refusals up front, real runs."""

from __future__ import annotations

import json
import logging
import re

import dask
import numpy as np
import pytest
import zarr
from sklearn.neighbors import NearestNeighbors

import eigenstream
from eigenstream import budget
from eigenstream.cluster import make_client
from eigenstream.config import Config
from eigenstream.errors import ConfigError

# Thread workers, as the other pipeline tests use: no process per worker, fixed count.
THREADS = {"kind": "local", "processes": False, "workers": 1}
N, COLUMNS = 3000, 200


def config(run: dict, cluster: dict | None = None, **sections) -> Config:
    data = {"input": {"path": "rows.npy"}, "run": run, "cluster": cluster or dict(THREADS)}
    data.update(sections)
    return Config.from_dict(data)


def test_derived_rows_shrink_as_columns_grow_and_grow_with_the_limit():
    # 10^6 rows: approximate neighbours, so the block rows alone are sized (no exact search)
    two = {"workers": 2, "processes": False}
    by_columns = [
        budget.derived_chunk_rows(config({"memory_limit": "2GiB"}, two), 10**6, d)[0]
        for d in (10, 300, 1000, 3000)
    ]
    assert by_columns == sorted(by_columns, reverse=True)
    assert by_columns[0] > by_columns[-1]
    by_limit = [
        budget.derived_chunk_rows(config({"memory_limit": m}, two), 10**6, 1000)[0]
        for m in ("512MiB", "1GiB", "4GiB", "16GiB")
    ]
    assert by_limit == sorted(by_limit)
    assert by_limit[-1] > by_limit[0]
    assert max(by_columns + by_limit) <= budget.MAX_AUTO_CHUNK_ROWS


def test_derived_blocks_stay_below_the_spill_threshold_dask_gives_its_workers():
    # The worker limit is dask's own (scheduler_info of a real LocalCluster, see cluster.py),
    # and the fraction is dask's default `spill` threshold of process memory.
    cfg = config({"memory_limit": "1GiB"}, {"workers": 2, "processes": True})
    rows = budget.derived_chunk_rows(cfg, N, COLUMNS)[0]
    with make_client(cfg.cluster, cfg.run.memory_limit) as client:
        workers = client.scheduler_info(n_workers=-1)["workers"].values()
        limits = [w["memory_limit"] for w in workers]
    assert limits == [512 << 20] * 2
    spill = dask.config.get("distributed.worker.memory.spill")
    need = budget.worker_need(cfg, N, COLUMNS, rows, threads=1) + budget.WORKER_PROCESS_BYTES
    assert need <= spill * limits[0]
    # and the next size up (1, 2, 5 steps) would not have fitted, so the limit shaped it
    bigger = {1: 2, 2: 5, 5: 10}[int(str(rows)[0])] * 10 ** (len(str(rows)) - 1)
    grown = budget.worker_need(cfg, N, COLUMNS, bigger, threads=1) + budget.WORKER_PROCESS_BYTES
    assert grown > spill * limits[0]


def test_an_explicit_number_of_rows_wins():
    cfg = config({"memory_limit": "256MiB", "chunk_rows": 1234})
    assert budget.resolve_chunk_rows(cfg, 10**6, 5000) == 1234  # "auto" would refuse here
    assert budget.estimate(cfg, 10**6, 10)["row block"] == 1234 * budget.row_bytes(cfg, 10)
    auto = config({"memory_limit": "256MiB"})
    with pytest.raises(ConfigError):
        budget.resolve_chunk_rows(auto, 10**6, 5000)


def test_a_limit_too_small_for_the_columns_is_refused_with_the_figure():
    cfg = config({"memory_limit": "256MiB"}, {"workers": 2, "processes": True})
    with pytest.raises(ConfigError, match=r"`\[run\] memory_limit`") as caught:
        budget.resolve_chunk_rows(cfg, 10**6, 2000)
    message = str(caught.value)
    assert "\n" not in message and "lower `[cluster] workers`" in message
    figure = float(re.search(r"at least ([0-9.]+) GiB", message).group(1))
    # the figure is enough: a limit just above it gives blocks of at least 1000 rows
    enough = config({"memory_limit": f"{figure + 0.01:.2f}GiB"}, {"workers": 2, "processes": True})
    assert budget.derived_chunk_rows(enough, 10**6, 2000)[0] >= budget.MIN_CHUNK_ROWS


def test_job_queue_workers_are_sized_from_their_own_memory():
    slurm = {"kind": "slurm", "cores": 4, "processes_per_job": 2, "memory": "600MiB",
             "walltime": "01:00:00"}
    cfg = config({"memory_limit": "64GiB"}, slurm)
    share = budget.worker_share(cfg)
    assert (share.bytes, share.threads) == (300 << 20, 2)
    with pytest.raises(ConfigError, match=r"raise `\[cluster\] memory` to at least"):
        budget.resolve_chunk_rows(cfg, 10**6, 1000)


def test_an_earlier_block_size_is_kept_only_while_it_fits():
    cfg = config({"memory_limit": "512MiB"})
    derived = budget.derived_chunk_rows(cfg, N, COLUMNS)[0]
    assert budget.resolve_chunk_rows(cfg, N, COLUMNS, earlier=None) == derived
    assert budget.resolve_chunk_rows(cfg, N, COLUMNS, earlier=derived // 2) == derived // 2
    assert budget.resolve_chunk_rows(cfg, N, COLUMNS, earlier=derived * 10) == derived


def test_driver_graph_bytes_follow_the_limit():
    assert budget.driver_graph_bytes(config({"memory_limit": "2GiB"})) == 1 << 30
    assert 0 < budget.driver_graph_bytes(config({})) <= budget.available_bytes()


@pytest.fixture(scope="module")
def wide_table(tmp_path_factory):
    """3000 rows x 200 columns: a noisy circle spread over 200 columns by a random map."""
    folder = tmp_path_factory.mktemp("budget")
    rng = np.random.default_rng(7)
    theta = rng.uniform(0, 2 * np.pi, N)
    circle = np.c_[np.cos(theta), np.sin(theta), 0.05 * rng.standard_normal(N)]
    rows = circle @ rng.standard_normal((3, COLUMNS)) + 0.01 * rng.standard_normal((N, COLUMNS))
    np.save(folder / "rows.npy", rows)
    return folder, rows


def run_config(folder, memory_limit: str) -> dict:
    return {
        "input": {"path": str(folder / "rows.npy")},
        "graph": {"neighbors": 10},
        "run": {"workdir": str(folder / "work"), "memory_limit": memory_limit,
                "dtype": "float64"},
        "cluster": dict(THREADS),
    }


def _finished_at(work) -> dict[str, float]:
    return {p.parent.name: json.loads(p.read_text())["finished_at"]
            for p in sorted(work.glob("*/stage.json"))}


def test_a_256_mib_run_uses_the_derived_blocks_and_resumes_without_rerunning(wide_table, caplog):
    folder, rows = wide_table
    cfg = run_config(folder, "256MiB")
    expected = budget.derived_chunk_rows(Config.from_dict(cfg), N, COLUMNS)[0]
    assert expected < N  # the limit, not the table, sets the blocks: several of them
    with caplog.at_level(logging.INFO, logger="eigenstream.budget"):
        result = eigenstream.run(cfg, progress=False)
    assert f'"auto": {expected} rows per block' in caplog.text
    work = folder / "work"
    record = json.loads((work / "run.json").read_text())
    assert record["state"] == "complete"
    assert record["config"]["run"]["chunk_rows"] == expected
    # the stages' outputs are chunked by the derived block and the neighbour stage says so
    assert zarr.open_group(str(work / "read" / "data.zarr"), mode="r")["rows"].chunks[0] == expected
    coords = zarr.open_group(str(work / "extend" / "data.zarr"), mode="r")["coordinates"]
    assert coords.chunks[0] == expected
    summary = json.loads((work / "neighbors" / "stage.json").read_text())["summary"]
    assert summary["block_rows"] == expected
    # the blocked exact search is the exact kNN: scikit-learn's brute force agrees
    knn = zarr.open_group(str(work / "neighbors" / "data.zarr"), mode="r")
    dist, _ = NearestNeighbors(n_neighbors=11, algorithm="brute").fit(rows).kneighbors(rows)
    np.testing.assert_allclose(np.asarray(knn["distances"][...]), dist[:, 1:], rtol=1e-7)
    assert np.asarray(result.coordinates[...]).shape == (N, 2)

    # Same settings again, then more memory: "auto" would now allow bigger blocks but keeps
    # the work directory's size, so no stage runs again.
    before = _finished_at(work)
    eigenstream.run(cfg, progress=False)
    assert _finished_at(work) == before
    roomier = run_config(folder, "1GiB")
    assert budget.derived_chunk_rows(Config.from_dict(roomier), N, COLUMNS)[0] > expected
    eigenstream.run(roomier, progress=False)
    assert _finished_at(work) == before
    assert json.loads((work / "run.json").read_text())["config"]["run"]["chunk_rows"] == expected


def test_a_run_that_cannot_fit_is_refused_before_it_starts(wide_table, tmp_path):
    folder, _ = wide_table
    cfg = run_config(folder, "64MiB")
    cfg["run"]["workdir"] = str(tmp_path / "never")
    with pytest.raises(ConfigError, match=r"`\[run\] memory_limit` .* at least [0-9.]+ GiB"):
        eigenstream.run(cfg, progress=False)
    assert not (tmp_path / "never").exists()


def _slow_block(start: int, stop: int):
    import time

    time.sleep(0.05)
    return start, stop, 0


def test_blocks_in_flight_are_limited_and_every_block_is_collected(tmp_path):
    from eigenstream.pipeline import StageContext
    from eigenstream.workdir import Workdir

    cfg = config({"workdir": str(tmp_path / "w")})
    ranges = [(10 * i, 10 * i + 10) for i in range(12)]
    submitted, outstanding = [], []
    with make_client(cfg.cluster) as client:
        limit = budget.blocks_in_flight(sum(client.nthreads().values()))

        def submitter(s, e):
            def submit():
                outstanding.append(sum(not f.done() for f in submitted))
                submitted.append(client.submit(_slow_block, s, e, pure=False))
                return submitted[-1]
            return submit

        workdir = Workdir(tmp_path / "w")
        workdir.create()
        ctx = StageContext(cfg, workdir, client, "extend", show_progress=False)
        finished = {0, 5}
        tasks = [(i, submitter(s, e)) for i, (s, e) in enumerate(ranges) if i not in finished]
        ctx.collect_blocks(tasks, ranges, finished)
    assert len(submitted) == len(ranges) - len(finished) > limit
    assert max(outstanding) < limit  # each submission found a free place
    assert workdir.done_blocks("extend") == set(range(len(ranges))) - finished  # all marked


@pytest.mark.parametrize("reference_rows, dim", [(3000, 10), (8000, 120)])
def test_placing_rows_stays_within_its_modelled_scratch(reference_rows, dim):
    # Outside measure: Python's tracemalloc, which traces numpy's allocations. Placing a block
    # against the landmarks must not need more than budget.support_search_bytes (plus the
    # reference rows the caller already holds), else derived blocks could overrun the limit.
    import tracemalloc

    from eigenstream.core.extension import extend_rows
    from eigenstream.core.neighbors import exact_knn

    rng = np.random.default_rng(0)
    basis = rng.normal(size=(3, dim))
    train = rng.uniform(size=(reference_rows, 3)) @ basis + 0.01 * rng.normal(size=(reference_rows, dim))
    rows = rng.uniform(size=(5000, 3)) @ basis + 0.01 * rng.normal(size=(5000, dim))
    _, dist = exact_knn(train, 15)
    state = dict(radius=dist[:, -1], sigma=dist[:, 6], q=np.ones(reference_rows),
                 degrees=np.ones(reference_rows), psi=np.ones((reference_rows, 4)),
                 eigenvalues=np.linspace(0.99, 0.9, 4), k=15, bandwidth="adaptive",
                 bandwidth_neighbor=7, alpha=1.0, diffusion_time=1.0)
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        extend_rows(rows, train, **state)
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    model = budget.support_search_bytes(reference_rows, dim, rows.shape[0])
    assert 0.25 * model < peak <= model, (peak, model)


def test_graph_stages_stay_within_their_modelled_parts():
    # Outside measure: Python's tracemalloc (numpy's allocations). The affinity build and the
    # LOBPCG solve of a 20,000-row sheet must each stay within their part of budget.estimate,
    # which the run compares with the limit one stage at a time (the largest part, not the
    # sum); and the model must not be far above them (a part 4x too big would refuse runs).
    # Measured when written: affinity 17.6 MiB against 32.0, solve 22.6 against 42.4.
    import tracemalloc

    from eigenstream.core.graph import alpha_normalize, symmetric_affinity
    from eigenstream.core.kernels import adaptive_bandwidths, gaussian_weights
    from eigenstream.core.neighbors import exact_knn
    from eigenstream.core.spectral import solve_embedding

    n, dim, k = 20_000, 10, 15
    rng = np.random.default_rng(1)
    sheet = rng.uniform(size=(n, 2)) * [4.0, 1.0]
    X = np.c_[sheet, 0.01 * rng.normal(size=(n, dim - 2))]
    idx, dist = exact_knn(X, k)
    parts = budget.estimate(config({"chunk_rows": 1000, "memory_limit": "16GiB"},
                                   graph={"neighbors": k}), n, dim)
    peaks = {}
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        sigma = adaptive_bandwidths(dist, neighbor=7)
        K = symmetric_affinity(idx, gaussian_weights(dist, sigma, sigma[idx]), n)
        peaks["affinity (CSR build)"] = tracemalloc.get_traced_memory()[1] - base
        g = alpha_normalize(K, 1.0)
        held = K.data.nbytes + K.indices.nbytes + K.indptr.nbytes  # the solve's part counts K
        holder = [K]  # handed over as the solve stage does, so the solve can free it
        del K
        base = tracemalloc.get_traced_memory()[0] - held
        tracemalloc.reset_peak()
        solve_embedding(holder.pop(), g.scale, g.degrees, components=2, diffusion_time=1.0,
                        solver="lobpcg", seed=0)
        peaks["eigensolver"] = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    for name, peak in peaks.items():
        assert 0.25 * parts[name] < peak <= parts[name], (name, peak, parts[name])
