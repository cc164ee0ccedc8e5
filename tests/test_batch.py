"""``sheetview batch`` and ``sheetview trend``: one row per structure, failures recorded,
resume after SIGKILL, unwritable output, the Dask path.

Expected values come from the construction of the test structures
(:func:`sheetview.synth.pack_stacks` with ``layers="fixed:2"``: every prism is in a
stack of exactly 2 layers) and from ``sheetview measure`` on each file alone (the batch
must reproduce the single-structure job exactly: derived).
"""
import base64
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

import sheetview as sv
from sheetview.batch import flatten, group_stats, read_summary, result_key
from sheetview.cli import main
from sheetview.synth import pack_stacks

FAST = ["--voxel", "0.3", "--lines", "300", "--no-intrusion", "--no-plots", "--no-html", "-q"]


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    d = tmp_path_factory.mktemp("inputs")
    paths = []
    for s in range(3):
        r = pack_stacks(sv.Box((0, 0, 0), (12, 12, 12)), 5, layers="fixed:2",
                        lateral_size="fixed:3", seed=s)
        p = d / f"s{s}.csv"
        sv.write(r.structure, p)
        paths.append(p)
    bad = d / "bad.csv"
    bad.write_text("this is not a prism table\n1,2\n")
    return d, paths, bad


def batch(*args):
    return CliRunner().invoke(main, ["batch", *map(str, args)])


@pytest.fixture(scope="module")
def reference(inputs, tmp_path_factory):
    """An uninterrupted in-process batch over the three good structures."""
    d, paths, _ = inputs
    out = tmp_path_factory.mktemp("ref") / "out"
    r = batch(d / "s*.csv", "-o", out, *FAST)
    assert r.exit_code == 0, r.output
    return out


def descendants(pid):
    """Process ids below ``pid`` (Linux /proc)."""
    kids = {}
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as fh:
                    ppid = int(fh.read().rsplit(")", 1)[1].split()[1])
            except (OSError, IndexError, ValueError):
                continue
            kids.setdefault(ppid, []).append(int(d))
    out, todo = [], [pid]
    while todo:
        q = todo.pop()
        for c in kids.get(q, []):
            out.append(c)
            todo.append(c)
    return out


def zombie(pid):
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] == "Z"
    except OSError:
        return True


def comparable(cols):
    return {k: v for k, v in cols.items() if not k.startswith("timings_s")}


def test_one_row_per_structure(inputs, reference):
    """Three structures -> three rows; stacking mean 2 by construction (fixed:2 layers);
    the header metadata (synth seed) becomes a column; the volume fractions of the phase
    classes partition the domain (sum 1, common practice); the numbers equal those of
    ``sheetview measure --json`` on the file alone (derived)."""
    d, paths, _ = inputs
    cols = read_summary(reference / "summary.csv")
    assert len(cols["input"]) == 3
    assert cols["status"] == ["ok"] * 3
    assert cols["input_metadata.synth.seed"] == [0.0, 1.0, 2.0]
    assert cols["stacking.mean"] == pytest.approx([2.0] * 3)
    assert cols["n_prisms"] == [float(len(sv.read(p))) for p in paths]
    tot = np.add.reduce([np.array(cols[f"volume_fractions.{k}"])
                         for k in ("solid", "interlayer", "gel")])
    assert tot == pytest.approx(1.0, abs=1e-9)
    one = CliRunner().invoke(main, ["measure", str(paths[1]), "--json", "--voxel", "0.3",
                                    "--lines", "300", "--no-intrusion", "-q"])
    doc = json.loads(one.stdout)
    for k in ("volume_fractions.solid", "specific_surface_nm-1", "chords.solid_mean_nm",
              "pore_size.d50_nm", "order.S"):
        assert cols[k][1] == pytest.approx(flatten(doc)[k], rel=1e-12), k
    import pyarrow.parquet as pq
    t = pq.read_table(reference / "summary.parquet").to_pydict()
    assert t["input"] == cols["input"] and t["volume_fractions.solid"] == cols["volume_fractions.solid"]
    # rerun: everything skipped, same table
    r = batch(d / "s*.csv", "-o", reference, *FAST)
    assert r.exit_code == 0 and "0 measured, 3 finished before" in r.output
    assert comparable(read_summary(reference / "summary.csv")) == comparable(cols)


def test_failed_input_recorded_and_others_finish(inputs, tmp_path):
    """A corrupt file among good ones: its reader error is recorded, the good one is
    measured by the worker pool, exit status 1."""
    d, paths, bad = inputs
    out = tmp_path / "out"
    r = batch(paths[0], bad, "-o", out, "--workers", "2", *FAST)
    assert r.exit_code == 1, r.output
    cols = read_summary(out / "summary.csv")
    assert cols["status"] == ["ok", "failed"]
    assert "bad.csv" in cols["error"][1] and "ax" in cols["error"][1]
    assert cols["n_prisms"][0] == len(sv.read(paths[0])) and cols["n_prisms"][1] is None
    failed = list((out / "failed").glob("*.json"))
    assert len(failed) == 1 and "bad.csv" in json.loads(failed[0].read_text())["error"]


@pytest.mark.parametrize("workers", [1, 2])
def test_kill_and_resume(inputs, reference, tmp_path, workers):
    """SIGKILL after the first result (in-process and with a worker pool): no result
    folder is incomplete, a rerun finishes the others and the summary equals that of an
    uninterrupted run."""
    d, paths, _ = inputs
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "sheetview", "batch", str(d / "s*.csv"), "-o", str(out),
           "--workers", str(workers), *FAST]
    p = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    t0 = time.time()
    while time.time() - t0 < 60 and p.poll() is None:
        if [f for f in out.glob("runs/*/summary.json") if not f.parent.name.startswith(".")]:
            break
        time.sleep(0.01)
    family = descendants(p.pid)
    p.send_signal(signal.SIGKILL)
    p.wait()
    done = [f for f in (out / "runs").iterdir() if not f.name.startswith(".")]
    assert 1 <= len(done) < 3  # killed mid-way
    assert not (out / "summary.csv").exists()
    # the pool's workers notice that the batch is gone and stop (no orphan goes on)
    t0 = time.time()
    while time.time() - t0 < 20 and any(os.path.exists(f"/proc/{q}") and not zombie(q)
                                        for q in family):
        time.sleep(0.05)
    assert not [q for q in family if os.path.exists(f"/proc/{q}") and not zombie(q)]
    # (a worker may have finished the structure it had in hand: a complete result)
    done = [f for f in (out / "runs").iterdir() if not f.name.startswith(".")]
    assert all((f / "summary.json").is_file() for f in done)
    r = batch(d / "s*.csv", "-o", out, *FAST)
    assert r.exit_code == 0, r.output
    assert f"{3 - len(done)} measured, {len(done)} finished before" in r.output
    assert not [f for f in out.rglob(".*") if ".part" in f.name]
    assert comparable(read_summary(out / "summary.csv")) == \
        comparable(read_summary(reference / "summary.csv"))


def test_unwritable_output(inputs, tmp_path):
    """A read-only output folder is a usage error (exit 2) with a clear message."""
    d, paths, _ = inputs
    out = tmp_path / "ro"
    out.mkdir()
    out.chmod(0o555)
    try:
        if os.access(out, os.W_OK):
            pytest.skip("running as a user who may write a read-only folder (root)")
        r = batch(paths[0], "-o", out, *FAST)
        assert r.exit_code == 2
        assert "not writable" in r.output and str(out) in r.output
    finally:
        out.chmod(0o755)


def test_usage_errors(inputs, tmp_path):
    """A glob matching nothing, a bad option: exit 2, one line, no traceback."""
    d, _, _ = inputs
    r = batch(d / "nothing*.csv", "-o", tmp_path / "o", *FAST)
    assert r.exit_code == 2 and "matches no file" in r.output
    r = batch(d / "s*.csv", "-o", tmp_path / "o", "--lines", "0")
    assert r.exit_code == 2 and "--lines" in r.output
    afile = tmp_path / "afile"
    afile.write_text("x")
    r = batch(d / "s*.csv", "-o", afile / "sub", *FAST)
    assert r.exit_code == 2 and "cannot create the output folder" in r.output
    r = batch(d / "s*.csv", "-o", afile, *FAST)
    assert r.exit_code == 2 and "is not a folder" in r.output


def test_dask_cluster_same_numbers(inputs, reference, tmp_path):
    """The Dask path (a LocalCluster on loopback, one in-process worker, reached by its
    address) gives the same table as the local path."""
    distributed = pytest.importorskip("distributed")
    d, _, _ = inputs
    out = tmp_path / "out"
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  protocol="tcp", host="127.0.0.1",
                                  dashboard_address=None) as cluster:
        r = batch(d / "s*.csv", "-o", out, "--cluster", cluster.scheduler_address, *FAST)
    assert r.exit_code == 0, r.output
    assert comparable(read_summary(out / "summary.csv")) == \
        comparable(read_summary(reference / "summary.csv"))
    # cluster="local": a LocalCluster started by the batch itself (threads, to stay light)
    from sheetview.batch import run_batch
    from sheetview.cli.measure import measure_settings
    out2 = tmp_path / "out2"
    res = run_batch([str(d / "s1.csv")], out2,
                    measure_settings(voxel=0.3, lines=300, seed=0, intrusion=False),
                    plots=False, html_pages=False, quiet=True, cluster="local",
                    dask_options={"processes": False, "n_workers": 1})
    assert res.n_done == 1 and res.n_failed == 0
    ref = comparable(read_summary(reference / "summary.csv"))
    got = comparable(read_summary(out2 / "summary.csv"))
    assert {k: v[0] for k, v in got.items()} == {k: v[1] for k, v in ref.items()}


def test_html_pages(inputs, tmp_path):
    """The structure page is self-contained: its figures are inlined base64 PNG (PNG
    signature, W3C PNG specification) and the index links it."""
    d, paths, _ = inputs
    out = tmp_path / "out"
    r = batch(paths[0], "-o", out, "--voxel", "0.3", "--lines", "300", "--no-intrusion",
              "--only", "stacking,order,phases", "-q")
    assert r.exit_code == 0, r.output
    page = next((out / "runs").glob("*/report.html")).read_text()
    imgs = page.split("data:image/png;base64,")[1:]
    assert imgs
    for chunk in imgs:
        assert base64.b64decode(chunk.split("'")[0])[:8] == b"\x89PNG\r\n\x1a\n"
    assert "volume_fractions.solid" in page and "angle_tol" in page
    index = (out / "index.html").read_text()
    assert "report.html" in index and str(paths[0]) in index


def test_group_stats_and_trend(tmp_path):
    """Replica statistics against numpy mean and sample standard deviation (ddof=1,
    common practice); the trend command writes a PNG and refuses an unknown column."""
    x = [1, 1, 1, 2, 2, 3]
    y = [1.0, 2.0, 4.0, 5.0, 7.0, 9.0]
    g = ["a", "a", "a", "a", "b", "b"]
    st = group_stats(x, y, g)
    xs, m, s, n = st["a"]
    assert xs == [1, 2] and list(n) == [3, 1]
    assert m == pytest.approx([np.mean([1, 2, 4]), 5.0])
    assert s == pytest.approx([np.std([1, 2, 4], ddof=1), 0.0])
    summ = tmp_path / "s.csv"
    summ.write_text("p,v,g\n" + "".join(f"{a},{b},{c}\n" for a, b, c in zip(x, y, g)))
    r = CliRunner().invoke(main, ["trend", str(summ), "--x", "p", "--y", "v", "--group", "g",
                                  "-o", str(tmp_path / "t.png")])
    assert r.exit_code == 0, r.output
    assert (tmp_path / "t.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    r = CliRunner().invoke(main, ["trend", str(summ), "--x", "p", "--y", "nope",
                                  "-o", str(tmp_path / "u.png")])
    assert r.exit_code == 2 and "nope" in r.output


def test_key_depends_on_content_and_settings():
    """The result key changes with the input hash and with any setting; key order in the
    settings does not matter (canonical JSON)."""
    a = result_key("0" * 64, {"settings": {"voxel": 0.3, "lines": 300}})
    assert a == result_key("0" * 64, {"settings": {"lines": 300, "voxel": 0.3}})
    assert a != result_key("1" + "0" * 63, {"settings": {"voxel": 0.3, "lines": 300}})
    assert a != result_key("0" * 64, {"settings": {"voxel": 0.3, "lines": 301}})


def test_same_content_and_missing_file(inputs, reference, tmp_path):
    """Results are found by content: a renamed copy of a measured file is not measured
    again, the same content twice is measured once (two rows), a missing path is a
    recorded failure (exit 1)."""
    import shutil
    d, paths, _ = inputs
    out = tmp_path / "out"
    shutil.copytree(reference, out)
    copy = tmp_path / "renamed.csv"
    shutil.copy(paths[0], copy)
    r = batch(copy, "-o", out, *FAST)
    assert r.exit_code == 0 and "0 measured, 1 finished before" in r.output, r.output
    r = batch(paths[0], copy, tmp_path / "missing.csv", "-o", out, *FAST)
    assert r.exit_code == 1 and "0 measured, 1 finished before, 1 failed" in r.output, r.output
    cols = read_summary(out / "summary.csv")
    assert cols["input"] == [str(paths[0]), str(copy), str(tmp_path / "missing.csv")]
    assert cols["result"][0] == cols["result"][1] != ""
    assert cols["volume_fractions.solid"][1] == read_summary(
        reference / "summary.csv")["volume_fractions.solid"][0]
    assert cols["status"][2] == "failed" and "missing.csv" in cols["error"][2]


# ------------------------------------------------------------------ one settings builder
def gapped_stack(path):
    """Three 18-triangle layers (rhombus patches, edge 1 nm, thickness 0.7 nm) at z = 0,
    1.4 and 3.25 nm: the top gap is 1.85 nm, 0.45 nm off the 1.4 nm repeat."""
    from sheetview.synth import rhombus_patch
    layer = rhombus_patch(3, 1.0)
    v = np.concatenate([layer + [0, 0, z] for z in (0.0, 1.4, 3.25)])
    sv.write(sv.Structure(v, 0.7, sv.Sphere((0, 0, 1.6), 6.0)), path)
    return path


NON_DEFAULT = ["--gap-tol", "0.5", "--angle-tol", "7", "--overlap", "0.2", "--tilt-limit", "30",
               "--local-radius", "4", "--frame", "director"]
SMALL = ["--voxel", "0.3", "--lines", "300", "--no-intrusion"]


def test_batch_equals_measure_with_non_default_tolerances(tmp_path):
    """Stacking by construction: the top layer is 0.45 nm off the repeat, so with the
    default gap tolerance (0.35 nm) it is a layer of its own (stacking numbers 2 and 1:
    mean (2*36 + 18)/54 = 5/3), and with --gap-tol 0.5 the three layers are one stack
    (stacking number 3). With the same non-default tolerances, ``batch`` gives exactly the
    numbers of ``measure --json`` (derived: the same settings builder, the same job), and
    its result key and ``settings.*`` columns hold them."""
    p = gapped_stack(tmp_path / "gapped.csv")
    runner = CliRunner()
    default = json.loads(runner.invoke(main, ["measure", str(p), "--json", "-q", *SMALL]).stdout)
    assert default["stacking"]["max"] == 2
    assert default["stacking"]["mean"] == pytest.approx(5 / 3)
    r = runner.invoke(main, ["measure", str(p), "--json", "-q", *SMALL, *NON_DEFAULT])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["stacking"]["max"] == 3 and doc["stacking"]["mean"] == pytest.approx(3.0)
    # the interlayer class follows the stacking graph: the phase fractions differ too
    assert doc["volume_fractions"]["interlayer"] > default["volume_fractions"]["interlayer"]
    out = tmp_path / "out"
    r = batch(p, "-o", out, *SMALL, *NON_DEFAULT, "--no-plots", "--no-html", "-q")
    assert r.exit_code == 0, r.output
    got = json.loads(next((out / "runs").glob("*/summary.json")).read_text())

    def numbers(d):
        return {k: v for k, v in flatten(d).items()
                if not k.startswith(("timings_s", "input_metadata", "read_options", "provenance"))
                and k not in ("file", "note")}
    assert numbers(got) == numbers(doc)
    assert got["stacking"]["histogram"] == doc["stacking"]["histogram"] == {"3": 54}
    cols = read_summary(out / "summary.csv")
    assert cols["stacking.mean"] == [pytest.approx(3.0)]
    assert cols["settings.gap_tol"] == [0.5] and cols["settings.frame"] == ["director"]
    # the same batch with the default tolerances is another result (another key)
    r = batch(p, "-o", out, *SMALL, "--no-plots", "--no-html", "-q")
    assert r.exit_code == 0 and "1 measured, 0 finished before" in r.output, r.output
    assert read_summary(out / "summary.csv")["stacking.mean"] == [pytest.approx(5 / 3)]


def test_batch_accepts_every_measure_setting():
    """Every option of ``measure`` that changes a number is an option of ``batch`` with the
    same flags and default, and so is the moment of a grown structure
    (``--at-progress``/``--at-time``); ``measure`` has only its output options besides
    (derived from the two commands' declared parameters)."""
    from sheetview.cli.batch import batch as batch_cmd
    from sheetview.cli.measure import SETTINGS
    from sheetview.cli.measure import measure as measure_cmd
    m = {p.name: p for p in measure_cmd.params}
    b = {p.name: p for p in batch_cmd.params}
    assert set(m) - set(b) == {"file", "as_json", "output", "force"}  # FILE: batch takes many
    for name in SETTINGS + ("at_progress", "at_time"):
        assert m[name].opts == b[name].opts and m[name].default == b[name].default, name
        assert m[name].secondary_opts == b[name].secondary_opts, name


def test_key_hashes_exactly_the_number_settings():
    """The result key changes with every setting that changes a number and not with
    --max-memory (which only decides whether a grid may be built); defaults given
    explicitly give the key of defaults left out (derived: canonical JSON of the settings
    completed with the Settings defaults)."""
    from sheetview.batch import key_settings
    from sheetview.cli.measure import NO_NUMBER_SETTINGS, SETTINGS, measure_settings
    sha = "ab" * 32

    def key(**kw):
        return result_key(sha, {"settings": key_settings(measure_settings(**kw))})
    k0 = key()
    assert k0 == result_key(sha, {"settings": key_settings({})})
    other = {"voxel": 0.3, "angle_tol": 6.0, "gap_tol": 0.3, "overlap": 0.2, "tilt_limit": 30.0,
             "local_radius": 4.0, "frame": "director", "density": 2.6,
             "composition": "(CaO)1.5(SiO2)(H2O)2", "water_density": 1.0, "pore_split": "5,20",
             "edge_tol": 0.04, "s2_block": 100, "s2_rmax": 3.0, "n_walkers": 500,
             "intrusion": True, "lines": 1000, "seed": 1, "pore_method": "subvoxel"}
    assert set(other) == set(SETTINGS) - set(NO_NUMBER_SETTINGS)
    keys = {name: key(**{name: v}) for name, v in other.items()}
    assert k0 not in keys.values() and len(set(keys.values())) == len(other)
    assert key(max_memory="4G") == k0
    with pytest.raises(sv.OptionError, match="unknown setting"):
        key_settings({"angle_tolerance": 3})


@pytest.mark.parametrize("args,msg", [
    (["--gap-tol", "0.9"], "--gap-tol"),
    (["--angle-tol", "120"], "--angle-tol"),
    (["--local-radius", "-1"], "--local-radius"),
    (["--pore-split", "20,5"], "--pore-split"),
    (["--frame", "x"], "--frame"),
])
def test_batch_option_errors_like_measure(inputs, tmp_path, args, msg):
    """Bad measure options are refused by ``batch`` before anything is read or written,
    with the message ``measure`` gives (exit 2, no traceback)."""
    d, paths, _ = inputs
    out = tmp_path / "o"
    r = batch(paths[0], "-o", out, *FAST, *args)
    m = CliRunner().invoke(main, ["measure", str(paths[0]), *args])
    assert r.exit_code == m.exit_code == 2, r.output
    assert msg in r.output and "Traceback" not in r.output
    def line(res):  # the usage hint names the command itself
        return res.output.strip().splitlines()[-1].split(" (see `")[0]
    assert line(r) == line(m)
    assert not out.exists()


def _fake_task(path, folder, settings, read_kw, only, plots, threads, at=None):
    """Stands in for measure_one. In the worker process: the first structure is done,
    the second kills the process (as the OOM killer would). In the calling process: wait
    until the worker has taken its second, so that the calling process cannot take every
    remaining structure first (its own tasks are instant)."""
    import os as _os
    import time as _time
    here = Path(folder).parent
    if _os.getpid() != settings["parent"]:
        marker = here / f"worker-{_os.getpid()}"
        if marker.exists():
            (here / f"dying-{_os.getpid()}").write_text("")
            _os._exit(3)
        marker.write_text("")
    else:
        t0 = _time.time()
        while not list(here.glob("dying-*")) and _time.time() - t0 < 60:
            _time.sleep(0.01)
    return {"status": "ok", "error": None, "seconds": 0.0, "write_seconds": 0.0,
            "pid": _os.getpid(), "threads": threads}


def test_local_workers_share_out_and_survive_a_dead_worker(tmp_path):
    """Two workers: the calling process and one worker process each take the next
    structure when free; every structure is done exactly once. The worker process dies
    on its second structure: that structure alone is recorded as failed and the rest are
    done by the calling process (derived from the scheduling rules)."""
    from sheetview.batch import Job, _run_local
    jobs = [Job(Path(f"in{i}.csv"), None, f"k{i}", f"n{i}") for i in range(8)]
    got = {}

    def finished(job, r):
        assert job.key not in got
        got[job.key] = r
    settings = {"parent": os.getpid()}
    args = lambda j, threads: (str(j.path), str(tmp_path / j.name), settings, {}, None, False,
                               threads)
    _run_local(jobs, args, finished, workers=2, ncpu=2, task=_fake_task)
    assert sorted(got) == sorted(j.key for j in jobs)
    failed = [k for k, r in got.items() if r["status"] == "failed"]
    assert len(failed) == 1 and "worker failed" in got[failed[0]]["error"]
    pids = [r["pid"] for r in got.values() if r["status"] == "ok"]
    assert pids.count(os.getpid()) == 6 and len(set(pids)) == 2
    assert {r["threads"] for r in got.values() if r["status"] == "ok"} == {1}


def test_workers_forked_from_a_warm_process(inputs, reference, tmp_path):
    """From the command line (a process that has run no numba kernel yet) the worker is
    forked after the warm-up, under numba's fork-safe workqueue layer, and the summary
    equals that of the in-process run (derived: the same job)."""
    d, paths, _ = inputs
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "sheetview", "batch", str(d / "s*.csv"), "-o", str(out),
           "--workers", "2", *FAST]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    log = (out / "batch.log").read_text()
    assert "1 worker process(es) forked from this process after a" in log
    assert comparable(read_summary(out / "summary.csv")) == \
        comparable(read_summary(reference / "summary.csv"))


#: Probe code that starts numba's threading layer (a parallel kernel runs once).
_START_LAYER = """import numba, numpy as np
@numba.njit(parallel=True)
def total(a):
    s = 0.0
    for i in numba.prange(a.size):
        s += a[i]
    return s
total(np.ones(1000))
"""

_FORK_PROBE = """
import sys
import numba
from sheetview.batch import _fork_context
if sys.argv[3] == "program":
    sys.argv[0] = "/usr/local/bin/sheetview"  # as when the sheetview script runs
if sys.argv[1] == "started":
""" + textwrap.indent(_START_LAYER, "    ") + """ctx = _fork_context(choose_layer=sys.argv[2] == "choose")
try:
    layer = numba.threading_layer()
except ValueError:
    layer = numba.config.THREADING_LAYER
print(ctx.get_start_method() if ctx else None, layer)
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork path is Linux only")
@pytest.mark.parametrize("env_layer, state, choose, who", [
    (None, "fresh", "choose", "program"), ("omp", "fresh", "choose", "program"),
    (None, "fresh", "keep", "program"), (None, "fresh", "choose", "library"),
    (None, "started", "choose", "program"), ("workqueue", "started", "keep", "library")])
def test_fork_only_under_a_fork_safe_threading_layer(env_layer, state, choose, who):
    """Workers are forked only under a fork-safe numba threading layer (workqueue or
    TBB; GNU OpenMP is not fork-safe: numba documentation, "The Threading Layers"). A
    process that has started no layer is switched to workqueue only when allowed, in the
    sheetview program itself (not a library caller) and when NUMBA_THREADING_LAYER is
    unset; a started layer is never changed."""
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_THREADING_LAYER"}
    if env_layer:
        env["NUMBA_THREADING_LAYER"] = env_layer
    r = subprocess.run([sys.executable, "-c", _FORK_PROBE, state, choose, who],
                       capture_output=True, text=True, env=env, timeout=120)
    assert r.returncode == 0, r.stderr
    method, layer = r.stdout.split()
    if state == "fresh":
        if choose == "choose" and not env_layer and who == "program":
            assert (method, layer) == ("fork", "workqueue")
        else:
            assert method == "None" and layer == (env_layer or "default")
    else:  # a layer runs: fork exactly when it is fork-safe
        assert (method == "fork") == (layer in ("workqueue", "tbb"))
        if env_layer:
            assert layer == env_layer


def test_batch_at_progress_equals_measure_at_progress(tmp_path):
    """``batch --at-progress`` gives each structure exactly the numbers of ``measure
    --at-progress`` (derived: the same job on the same sub-structure); the moment is in
    the summary, the setting is part of the result key (a rerun at another progress
    measures anew, the full structure stays as it was), and an absurd value is refused
    before anything is read (exit 2)."""
    from sheetview import Sphere
    res = pack_stacks(Sphere((0, 0, 0), 8.0), 16, seeding="wall", orientation="wall",
                      lateral_size="fixed:4", layers="fixed:2", born=True, seed=2)
    p = tmp_path / "grown.npz"
    sv.write(res.structure, p)
    runner = CliRunner()
    m = runner.invoke(main, ["measure", str(p), "--json", "-q", "--at-progress", "0.5", *FAST[:5]])
    assert m.exit_code == 0, m.output
    doc = json.loads(m.stdout)
    out = tmp_path / "out"
    r = batch(p, "-o", out, "--at-progress", "0.5", *FAST)
    assert r.exit_code == 0, r.output
    got = json.loads(next((out / "runs").glob("*/summary.json")).read_text())
    assert got["at"] == doc["at"] and 0 < got["at"]["n_prisms"] < len(res.structure)
    for k in ("n_prisms", "volume_fractions", "stacking"):
        assert got[k] == doc[k]
    cols = read_summary(out / "summary.csv")
    assert cols["at.progress"] == [pytest.approx(doc["at"]["progress"])]
    r = batch(p, "-o", out, *FAST)          # the whole structure: another key, measured
    assert r.exit_code == 0 and "1 measured, 0 finished before" in r.output
    assert len(list((out / "runs").iterdir())) == 2
    r = batch(p, "-o", out, "--at-progress", "0.5", *FAST)
    assert r.exit_code == 0 and "0 measured, 1 finished before" in r.output
    r = batch(p, "-o", tmp_path / "o2", "--at-progress", "50", *FAST)
    assert r.exit_code == 2 and "fraction in (0, 1]" in r.output
    assert not (tmp_path / "o2").exists()


_FALLBACK_PROBE = """
import os, sys, time
import numba, numpy as np
import sheetview.batch as B
""" + _START_LAYER + """assert numba.threading_layer() == "workqueue"   # from the environment

def slow_init(*a):               # a forked worker that hangs at start
    time.sleep(30)
B._worker_init = slow_init
B.FORK_START_TIMEOUT = 1.0
jobs = [B.Job(f"in{i}.csv", None, f"k{i}", f"n{i}") for i in range(6)]
done = {}
lines = []
B._run_local(jobs, lambda j, t: (len(j.key), t), lambda j, r: done.setdefault(j.key, r),
             workers=2, ncpu=2, task=max, log=lambda m, console=True: lines.append(m))
print(sorted(done) == sorted(j.key for j in jobs), lines[0])
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork path is Linux only")
def test_a_worker_that_hangs_at_fork_falls_back_to_fresh_workers():
    """A forked worker that does not answer in time (or a fork that fails) is given up:
    the batch starts fresh workers and every structure is still measured once (derived
    from the scheduling rules)."""
    env = dict(os.environ, NUMBA_THREADING_LAYER="workqueue")
    r = subprocess.run([sys.executable, "-c", _FALLBACK_PROBE], capture_output=True, text=True,
                       env=env, timeout=180)
    assert r.returncode == 0, r.stderr
    ok, _, line = r.stdout.partition(" ")
    assert ok == "True", r.stdout
    assert "forking failed (TimeoutError" in line and "started by forkserver" in line
