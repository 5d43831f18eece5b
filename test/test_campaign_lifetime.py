"""A campaign's parent holds only what it has not stored yet, and its pool workers die with it."""

from __future__ import annotations

from campaign_lifetime_support import rss_growth_kib_per_scenario, sigkill_orphans

# Keeping every finished batch grew the parent by about 20 KiB per scenario of this short skill
# (13 KiB of traces plus the outcome objects); a flat parent stays near 0. The bound leaves room
# for allocator and SQLite page-cache noise over 300 measured scenarios.
GROWTH_BOUND_KIB = 6.0


def test_parent_memory_stays_flat_in_the_number_of_stored_scenarios(tmp_path):
    figures = rss_growth_kib_per_scenario(tmp_path, n_scenarios=400, warmup=100)
    assert figures["stored"] == 400
    assert figures["kib_per_scenario"] <= GROWTH_BOUND_KIB, figures


def test_pool_worker_dies_with_a_sigkilled_campaign_parent(tmp_path):
    # Each trial waits at most campaign_lifetime_support.WORKER_GONE_WITHIN_S for the worker.
    assert sigkill_orphans(tmp_path, trials=1) == [0]
