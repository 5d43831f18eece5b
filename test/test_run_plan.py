"""Each run gets its own ROS domain, a fresh (printed) seed, its own folder and file names, and
progress bars whose rate is the step's average."""

from __future__ import annotations

import os
import re
from pathlib import Path

import pytest

from compliant_demo.app.domains import MAX_DOMAIN_ID, DomainInUseError, lease_domain
from compliant_demo.app.progress import advance_to, progress_bar
from compliant_demo.app.run_plan import RUNS_FOLDER, planned_run, preferred_domain, unused_path
from compliant_demo.exceptions import InvalidInputError


def test_concurrent_leases_hold_different_domains_and_release_them(tmp_path: Path) -> None:
    with lease_domain(30, folder=tmp_path) as first, lease_domain(30, folder=tmp_path) as second:
        assert (first, second) == (30, 31)
        assert (tmp_path / "30.lock").read_text().strip() == str(os.getpid())
    with lease_domain(30, folder=tmp_path) as again:
        assert again == 30  # released when the block ended


def test_the_search_wraps_after_the_largest_domain(tmp_path: Path) -> None:
    with lease_domain(MAX_DOMAIN_ID, folder=tmp_path) as last, \
            lease_domain(MAX_DOMAIN_ID, folder=tmp_path) as wrapped:
        assert (last, wrapped) == (MAX_DOMAIN_ID, 0)


def test_an_explicit_domain_held_by_another_run_is_refused_naming_the_option(
    tmp_path: Path,
) -> None:
    with lease_domain(40, folder=tmp_path), pytest.raises(
        DomainInUseError,
        match=rf"--domain-id 40: ROS domain 40 is in use by the run with pid {os.getpid()}; "
              r"leave --domain-id out to take a free one",
    ), lease_domain(40, explicit=True, folder=tmp_path):
        pass


def test_every_domain_held_is_a_clear_error_after_a_bounded_search(tmp_path: Path) -> None:
    held = []
    try:
        for _ in range(MAX_DOMAIN_ID + 1):
            lease = lease_domain(0, folder=tmp_path)
            held.append((lease, lease.__enter__()))
        assert sorted(domain for _, domain in held) == list(range(MAX_DOMAIN_ID + 1))
        with pytest.raises(DomainInUseError, match=r"every ROS domain 0 to 101 is in use"), \
                lease_domain(5, folder=tmp_path):
            pass
    finally:
        for lease, _ in held:
            lease.__exit__(None, None, None)


@pytest.mark.parametrize("domain", [-1, 102])
def test_a_domain_out_of_range_is_refused(tmp_path: Path, domain: int) -> None:
    with pytest.raises(InvalidInputError, match=rf"domain_id = {domain}: must be 0 to 101"), \
            lease_domain(domain, folder=tmp_path):
        pass


def test_the_preferred_domain_follows_ros_domain_id(monkeypatch) -> None:
    monkeypatch.setenv("ROS_DOMAIN_ID", "23")
    assert preferred_domain() == 23
    for unusable in ("", "abc", "250"):
        monkeypatch.setenv("ROS_DOMAIN_ID", unusable)
        assert preferred_domain() == 17


@pytest.fixture
def private_locks(tmp_path: Path, monkeypatch) -> Path:
    """Domain locks of this test only, and a working directory of its own."""
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(tmp_path))
    monkeypatch.setenv("ROS_DOMAIN_ID", "50")
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    return work


def test_runs_draw_different_seeds_and_default_to_a_folder_of_their_own(private_locks) -> None:
    with planned_run("teaching-a", seed=None, domain_id=None, out_dir=None) as first, \
            planned_run("teaching-b", seed=None, domain_id=None, out_dir=None) as second:
        pass
    assert first.seed_drawn and second.seed_drawn
    assert (first.domain_id, second.domain_id) == (50, 51)
    assert first.out_dir == RUNS_FOLDER / "teaching-a" and first.out_dir.is_dir()
    assert first.truth_path == RUNS_FOLDER / "teaching-a" / "teacher_truth_teaching-a.npz"
    assert re.fullmatch(
        rf"run teaching-a: seed {first.seed} \(drawn; --seed {first.seed} repeats it\), "
        rf"ROS domain 50, files in {re.escape(str(private_locks / first.out_dir))}",
        first.describe())
    # Two drawn seeds collide with probability 1e-6; ten draws all equal would be a stuck RNG.
    seeds = set()
    for index in range(10):
        with planned_run(f"t{index}", seed=None, domain_id=None, out_dir=None) as plan:
            seeds.add(plan.seed)
    assert len(seeds) > 1


def test_a_given_seed_is_kept_and_said_to_be_given(private_locks) -> None:
    with planned_run("tour-x", seed=8, domain_id=60, out_dir=Path("mine")) as plan:
        assert (plan.seed, plan.seed_drawn, plan.domain_id) == (8, False, 60)
        assert plan.describe().startswith("run tour-x: seed 8, ROS domain 60, files in ")


def test_a_truth_file_of_an_earlier_run_is_never_reused(private_locks) -> None:
    out = Path("shared")
    out.mkdir()
    (out / "teacher_truth_bench.npz").write_bytes(b"earlier run")
    (out / "teacher_truth_bench-2.npz").write_bytes(b"earlier run")
    with planned_run("bench", seed=1, domain_id=None, out_dir=out) as plan:
        assert plan.truth_path == out / "teacher_truth_bench-3.npz"
    assert (out / "teacher_truth_bench.npz").read_bytes() == b"earlier run"


def test_unused_path_gives_up_after_a_bounded_number_of_names(tmp_path: Path) -> None:
    (tmp_path / "f.npz").touch()
    for number in range(2, 1000):
        (tmp_path / f"f-{number}.npz").touch()
    with pytest.raises(InvalidInputError, match=r"1000 files named f-N exist; choose another"):
        unused_path(tmp_path / "f.npz")


def test_the_progress_rate_is_the_average_over_the_step() -> None:
    # One demonstration done 13 s into the step, the store polled every 0.2 s in between.
    with progress_bar("record", 4, "demo", True) as bar:
        bar.start_t -= 13.0
        for _ in range(5):
            advance_to(bar, 0)
        advance_to(bar, 1)
        advance_to(bar, 0)  # never backwards
        shown = str(bar)
    assert bar.n == 1
    rate = re.search(r"([0-9.]+)s/demo", shown)
    assert rate is not None, shown
    assert 12.5 <= float(rate.group(1)) <= 14.0  # 13 s per demonstration, not 5 demo/s
