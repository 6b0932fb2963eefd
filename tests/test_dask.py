"""The Dask engine: the same scan and batch mark on a ``dask.distributed.LocalCluster``.

Skipped when the optional extra is not installed (``pip install 'claimkit[dask]'``).
One cluster (two worker processes, one thread each) serves the whole module.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from PIL import Image
from skimage import data

from claimkit import workflow
from claimkit.cli import scale
from claimkit.errors import InputError
from claimkit.evidence.storage import sha256_file

distributed = pytest.importorskip("dask.distributed")


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(processes=True, n_workers=2, threads_per_worker=1,
                                  dashboard_address=None) as c:
        yield c


def _save(img, path: Path, **kw) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    (img if isinstance(img, Image.Image) else Image.fromarray(img)).save(path, **kw)
    return path


def test_batch_mark_on_dask_registers_what_it_writes(profile, tmp_path, cluster, capsys):
    shoot = tmp_path / "shoot"
    _save(data.coffee(), shoot / "a" / "coffee.jpg", quality=92)
    _save(data.chelsea(), shoot / "b" / "chelsea.png")
    _save(data.rocket(), shoot / "b" / "rocket.jpg", quality=92)
    (shoot / "b" / "broken.jpg").write_bytes(b"\xff\xd8\xff\xe0 truncated")
    out = tmp_path / "marked"
    code = scale.mark_many(profile, [shoot], out, engine="dask",
                           scheduler=cluster.scheduler_address, json_lines=True)
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    assert code == 1
    assert [r["status"] for r in rows] == ["marked", "failed", "marked", "marked"]
    works = {w.record["marked"]["sha256"]: w.work_id for w in profile.works()}
    for r in rows:
        if r["status"] == "marked":
            assert works[sha256_file(r["output"])] == r["work_id"]
    assert not [p for p in out.rglob(".*")]
    assert profile.audit().ok
    # The marks made on the cluster are found in this process.
    rep, _ = workflow.examine_file(profile, out / "a" / "coffee.jpg")
    assert rep["detected"] and rep["work_id"] == rows[0]["work_id"]
    # And a second run on the cluster marks nothing twice.
    assert scale.mark_many(profile, [shoot], out, engine="dask",
                           scheduler=cluster.scheduler_address, json_lines=True) == 1
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    assert [r["status"] for r in rows] == ["skipped", "failed", "skipped", "skipped"]


def test_scan_on_dask_gives_the_local_answer(profile, tmp_path, cluster, capsys):
    marked = workflow.mark_file(profile, _save(data.coffee(), tmp_path / "coffee.png"),
                                tmp_path / "coffee-marked.png")
    web = tmp_path / "web"
    _save(Image.open(tmp_path / "coffee-marked.png"), web / "listing.jpg", quality=80)
    _save(data.chelsea(), web / "cat.jpg", quality=85)
    (web / "zz-broken.jpg").write_bytes(b"GIF89a....")
    assert scale.scan_folders(profile, [web], workers=1, json_lines=True) == 1
    local = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    assert scale.scan_folders(profile, [web], engine="dask",
                             scheduler=cluster.scheduler_address, json_lines=True) == 1
    remote = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    assert [r["file"] for r in remote] == [r["file"] for r in local]
    keys = ("detected", "work_id", "registered", "false_alarm_probability", "error")
    assert [[r.get(k) for k in keys] for r in remote] == [[r.get(k) for k in keys] for r in local]
    assert remote[1]["detected"] and remote[1]["work_id"] == marked["work_id"]


def test_unreachable_scheduler_is_a_clear_error():
    from claimkit.runner import make_engine

    with pytest.raises(InputError, match="cannot reach the Dask scheduler tcp://127.0.0.1:9"):
        make_engine("dask", scheduler="tcp://127.0.0.1:9", timeout=1)


def test_a_file_the_cluster_cannot_see_gets_a_hint(tmp_path):
    from claimkit.runner import remote_path_hint

    class Remote:
        name, in_process = "dask", False

    here = tmp_path / "here.jpg"
    here.write_bytes(b"x")
    hinted = remote_path_hint(Remote(), here, f"{here}: no such file")
    assert hinted.endswith("the cluster must see the same files under the same paths)")
    # A file missing everywhere is just missing.
    gone = tmp_path / "gone.jpg"
    assert remote_path_hint(Remote(), gone, f"{gone}: no such file") == f"{gone}: no such file"
