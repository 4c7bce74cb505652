"""A shared registry with one damaged file: every command that can still work does, and the ones that repair work.

Each test damages real files of a local registry behind its back (a truncated alias file, a truncated card), then
runs the ``veil`` command as a user would.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from veil.registry import Registry

from .test_cli import run
from .test_registry import NAME, version_files


@pytest.fixture
def shared(tmp_path: Path) -> tuple[Path, list[str]]:
    """A registry of two versions, ``live`` on the second (moved there from the first) and ``canary`` on the first."""
    root = tmp_path / "registry"
    registry = Registry(root)
    ids = [registry.add_version(NAME, version_files(seed)) for seed in (1, 2)]
    registry.promote(NAME, ids[0], alias="live", reason="first")
    registry.promote(NAME, ids[1], alias="live", reason="second")
    registry.promote(NAME, ids[0], alias="canary", reason="trial")
    return root, ids


def truncate(path: Path) -> None:
    """Cut a file in half, as a full disk or a killed copy leaves it."""
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def test_a_truncated_alias_blocks_nothing_and_promote_rewrites_it(shared: tuple[Path, list[str]]) -> None:
    root, ids = shared
    truncate(root / NAME / "aliases" / "canary.json")

    listed = run("versions", NAME, "--registry", root)
    assert listed.code == 0
    assert "damaged alias 'canary'" in listed.err
    assert ids[1] in listed.out
    assert "live" in listed.out
    assert run("history", NAME, "--registry", root).code == 0

    checked = run("verify", "--registry", root)
    assert checked.code == 1  # the damage is reported ...
    assert "alias 'canary' is unreadable" in checked.out
    assert checked.out.count("ok    ") == 2  # ... and every version is still checked

    promoted = run("promote", NAME, ids[1], "--alias", "canary", "--reason", "repair", "--registry", root)
    assert promoted.code == 0, promoted.err
    registry = Registry(root)
    state = registry.alias(NAME, "canary")
    assert state is not None
    assert state.version == ids[1]
    last = registry.history(NAME)[-1]
    # The history says the alias was rewritten, and where its file last pointed by the history's own record.
    assert last.from_version == ids[0]
    assert "damaged and is rewritten" in last.reason
    assert last.reason.startswith("repair")
    assert run("verify", "--registry", root).code == 0


def test_a_damaged_alias_rolls_back_by_its_history(shared: tuple[Path, list[str]]) -> None:
    root, ids = shared
    truncate(root / NAME / "aliases" / "live.json")
    rolled = run("rollback", NAME, "--alias", "live", "--reason", "bad week", "--registry", root)
    assert rolled.code == 0, rolled.err
    state = Registry(root).alias(NAME, "live")
    assert state is not None
    assert state.version == ids[0]


def test_an_alias_is_removed_and_its_removal_recorded(shared: tuple[Path, list[str]]) -> None:
    root, ids = shared
    truncate(root / NAME / "aliases" / "canary.json")
    removed = run("remove-alias", NAME, "canary", "--reason", "trial over", "--registry", root)
    assert removed.code == 0, removed.err
    registry = Registry(root)
    assert registry.alias(NAME, "canary") is None
    assert set(registry.aliases(NAME)) == {"live"}
    assert registry.damaged_aliases(NAME) == {}
    event = registry.history(NAME)[-1]
    assert (event.action, event.from_version, event.to_version) == ("remove", ids[0], None)
    assert event.applied
    # The removal is final until the alias is promoted again; removing it twice is refused by name.
    again = run("remove-alias", NAME, "canary", "--registry", root)
    assert again.code == 2
    assert "has no alias 'canary' to remove" in again.err
    assert run("promote", NAME, ids[1], "--alias", "canary", "--registry", root).code == 0
    assert run("verify", "--registry", root).code == 0


def test_a_removal_a_writer_died_in_is_completed_by_the_next_move(shared: tuple[Path, list[str]]) -> None:
    root, ids = shared
    registry = Registry(root)
    # The removal's event is written first; a writer killed before the tombstone leaves the alias in place.
    events = sorted((root / NAME / "history").iterdir())
    number = len(events) + 1
    event = {
        "event": number, "time": "t", "user": "u", "alias": "canary", "action": "remove",
        "from_version": ids[0], "to_version": None, "reason": "",
    }  # fmt: skip
    digits = len(events[-1].stem)  # the event files' own zero-padded numbering
    (root / NAME / "history" / f"{number:0{digits}d}.json").write_text(json.dumps(event))
    assert not registry.history(NAME)[-1].applied
    registry.promote(NAME, ids[0], alias="live", reason="next move")
    assert registry.alias(NAME, "canary") is None
    assert all(event.applied for event in registry.history(NAME))


def test_a_truncated_card_marks_its_version_damaged_and_lists_the_others(shared: tuple[Path, list[str]]) -> None:
    root, ids = shared
    truncate(root / NAME / "versions" / ids[0] / "card.json")
    listed = run("versions", NAME, "--registry", root)
    assert listed.code == 0, listed.err
    rows = {line.split()[0]: line for line in listed.out.splitlines()[1:] if line.startswith("v")}
    assert "DAMAGED" in rows[ids[0]]
    assert "DAMAGED" not in rows[ids[1]]
    assert f"damaged: {NAME} {ids[0]}: the card is missing or unreadable" in listed.out
    as_json = json.loads(run("versions", NAME, "--json", "--registry", root).out)
    assert [entry["problem"] is None for entry in as_json] == [False, True]
    checked = run("verify", "--registry", root)
    assert checked.code == 1
    assert f"FAIL  {NAME} {ids[0]}" in checked.out
    assert f"ok    {NAME} {ids[1]}" in checked.out


def test_promoting_the_version_an_alias_already_names_is_refused_and_records_nothing(
    shared: tuple[Path, list[str]],
) -> None:
    root, ids = shared
    events = len(Registry(root).history(NAME))
    again = run("promote", NAME, ids[1], "--alias", "live", "--registry", root)
    assert again.code == 2
    assert f"alias 'live' of {NAME} already points at {ids[1]}; nothing to promote" in again.err
    assert len(Registry(root).history(NAME)) == events


def test_rewriting_a_damaged_alias_keeps_its_dimension_and_its_rollback(shared: tuple[Path, list[str]]) -> None:
    root, ids = shared
    registry = Registry(root)
    wider = registry.add_version(NAME, version_files(3, d=8))
    truncate(root / NAME / "aliases" / "live.json")
    # The dimension the damaged file served is read from its last recorded move: a wider version is refused.
    refused = run("promote", NAME, wider, "--alias", "live", "--registry", root)
    assert refused.code == 2
    assert "has dimension 8 but alias 'live' serves dimension 6" in refused.err
    # Repaired onto the version it held: that move changes nothing, so one rollback still goes back a step.
    assert run("promote", NAME, ids[1], "--alias", "live", "--registry", root).code == 0
    assert run("rollback", NAME, "--alias", "live", "--registry", root).code == 0
    state = Registry(root).alias(NAME, "live")
    assert state is not None
    assert state.version == ids[0]
