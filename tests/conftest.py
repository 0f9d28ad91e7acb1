"""Shared pytest fixtures for ranktide."""

from __future__ import annotations

import os
import subprocess
from pathlib import Path
from typing import Iterator

import pytest

from ranktide.stream.broker import LocalKafka


def _kafka_skipped() -> bool:
    """Tell whether the user opted out of tests that need a real broker."""
    return os.environ.get("RANKTIDE_SKIP_KAFKA") == "1"


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Skip ``kafka``-marked tests only on explicit request, never silently."""
    if not _kafka_skipped():
        return
    skip = pytest.mark.skip(reason="RANKTIDE_SKIP_KAFKA=1")
    for item in items:
        if "kafka" in item.keywords:
            item.add_marker(skip)


@pytest.fixture(autouse=True)
def _reap_children() -> Iterator[None]:
    """No ``ranktide`` child process outlives the test that started it (even a failed one)."""
    yield
    from stream_helpers import reap_children

    reap_children()


@pytest.fixture(scope="session")
def kafka_broker() -> Iterator[LocalKafka]:
    """Yield one started local Kafka broker shared by the whole session.

    A broker that fails to start fails the tests that use it; set
    ``RANKTIDE_SKIP_KAFKA=1`` to skip them instead.
    """
    if _kafka_skipped():
        pytest.skip("RANKTIDE_SKIP_KAFKA=1")
    broker = LocalKafka()
    broker.start()
    try:
        yield broker
    finally:
        broker.stop()


@pytest.fixture
def tiny_disk(tmp_path: Path) -> Iterator[Path]:
    """A 512 KiB tmpfs: a real full disk (needs root and mount rights, as on this project's machines)."""
    mount_point = tmp_path / "disk"
    mount_point.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=512k", "tmpfs", str(mount_point)],
                          capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a small tmpfs here: {done.stderr.strip()}")
    try:
        yield mount_point
    finally:
        subprocess.run(["umount", "-l", str(mount_point)], check=False)
