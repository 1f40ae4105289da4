"""Hostile and mutated mask files, each read and design-rule checked in its own process under a 1 GB address-space
cap (the corpus and the capped fork server: ``tests/hostile_corpus.py``; 10,000 files: ``bench/soak_hostile.py``).

Common practice (no source): a reader of untrusted bytes ends every file with a result or a one-line refusal, never
with a crash, an internal error, unbounded time or unbounded memory.
"""

import re

import hostile_corpus as hc

#: Seeded mutations in the default suite (about 20 s on 2 cores); the soak script runs 10,000.
MUTATIONS = 400


def test_hostile_and_mutated_files_never_crash_and_stay_bounded(tmp_path):
    expect = hc.build_corpus(tmp_path / "corpus", mutations=MUTATIONS, seed=20240613)
    results = hc.run_corpus([tmp_path / "corpus" / name for name in sorted(expect)], cap_bytes=1 << 30, timeout_s=60)
    by_name = {r["name"]: r for r in results}
    assert set(by_name) == set(expect)
    bad = [(r["name"], r["outcome"], r["detail"], r.get("trace", "")) for r in results
           if r["outcome"] not in ("ok", "refused")]
    assert bad == []  # no crash (signal), no internal error, no timeout
    for name, pattern in expect.items():
        r = by_name[name]
        if r["outcome"] == "refused":
            assert "\n" not in r["detail"] and name in r["detail"], r  # one line naming the file
            assert r["exit_code"] in (2, 3), r
        if pattern is not None:  # the hostile cases: refused quickly, the message naming what was too large
            assert r["outcome"] == "refused" and re.search(pattern, r["detail"]), r
        # Common practice (no source): each file well under 5 s of CPU and 1 GB (the cap makes the second certain)
        assert r["cpu_s"] < 5.0, r
        assert r["maxrss_mb"] < 1024, r
    refused = sum(r["outcome"] == "refused" for r in results)
    assert 0 < refused < len(results)  # the corpus exercises both paths
    # the bombs of the issue: refused (or, for placements of nothing, read as nothing) without allocating
    for name in ("h_aref9999.gds", "h_fanout2_26.gds", "h_fanout2_26.oas", "h_rep9000.oas"):
        assert by_name[name]["outcome"] == "refused" and by_name[name]["cpu_s"] < 1.0, by_name[name]
    assert by_name["h_aref_empty.gds"]["detail"].startswith("ok 0 polygons")
    for name in ("h_circle8190.gds", "h_star8190.gds", "h_overlap65536.gds", "h_stack65536.gds"):
        assert by_name[name]["outcome"] == "ok", by_name[name]
