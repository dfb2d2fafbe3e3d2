"""Config loading: every key validated with a message naming it; flags beat the file."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from flairwatch.config import Config, cpus_available, load_config, with_overrides
from flairwatch.errors import ConfigInvalid


def test_example_config_loads_with_documented_defaults() -> None:
    cfg = load_config(Path(__file__).parent.parent / "config.example.yaml")
    assert cfg.settle_seconds == 30 and cfg.connectivity == 26 and cfg.min_lesion_mm3 == 10
    assert cfg.threshold is None and cfg.quarantine is None
    assert cfg.identifiers.patient_name == "drop"


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ("settle_secs: 3", "settle_secs"),
        ("connectivity: 8", "connectivity"),
        ("threshold: 1.5", "threshold"),
        ("workers: 0", "workers"),
        ("polling: 'yes'", "polling"),
        ("min_lesion_mm3: -1", "min_lesion_mm3"),
        ("identifiers: {patient_id: hash}", "identifiers.patient_id"),
        ("select: {modalities: 3}", "select.modalities"),
        ("inbox: [a, b]", "inbox"),
    ],
)
def test_bad_values_name_their_key(tmp_path: Path, text: str, key: str) -> None:
    path = tmp_path / "c.yaml"
    path.write_text(text + "\n")
    with pytest.raises(ConfigInvalid, match=key.replace(".", r"\.")):
        load_config(path)


def test_relative_paths_are_relative_to_the_config_file(tmp_path: Path) -> None:
    (tmp_path / "c.yaml").write_text("inbox: in\nresults: /abs/results\n")
    cfg = load_config(tmp_path / "c.yaml")
    assert cfg.inbox == tmp_path / "in" and cfg.results == Path("/abs/results")


def test_flags_beat_the_file_and_are_validated(tmp_path: Path) -> None:
    (tmp_path / "c.yaml").write_text("threshold: 0.3\nconnectivity: 6\n")
    cfg = with_overrides(load_config(tmp_path / "c.yaml"), threshold=0.7, connectivity=None)
    assert cfg.threshold == 0.7 and cfg.connectivity == 6
    with pytest.raises(ConfigInvalid, match="threshold"):
        with_overrides(cfg, threshold=7.0)


def test_not_yaml_mapping_is_refused(tmp_path: Path) -> None:
    (tmp_path / "c.yaml").write_text("- a\n- b\n")
    with pytest.raises(ConfigInvalid, match="mapping"):
        load_config(tmp_path / "c.yaml")


def test_cpu_count_respects_affinity() -> None:
    # A real child process pinned to one CPU (sched_setaffinity(2)) must see exactly one.
    code = (
        "import os; os.sched_setaffinity(0, {min(os.sched_getaffinity(0))}); "
        "from flairwatch.config import cpus_available; print(cpus_available())"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "1"
    assert 1 <= cpus_available() <= len(os.sched_getaffinity(0))


def test_threads_are_shared_among_workers() -> None:
    n = cpus_available()
    assert Config(workers=1).threads_per_worker() == n
    assert Config(workers=n * 4).threads_per_worker() == 1
    assert Config(threads=3).threads_per_worker() == 3
