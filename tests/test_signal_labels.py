"""One set of words for the kinds of signal, wherever a person reads them: dashboard,
report, exports' column descriptions, docs. The record's column prefixes stay short."""

from __future__ import annotations

import re
from pathlib import Path

from plantrig.sim import SIGNAL_LABELS, SIGNAL_MEANINGS, load_rig, tick_columns
from plantrig.sim.records._records import PREFIX_DESCRIPTIONS, column_info

REPO = Path(__file__).resolve().parents[1]


def test_the_true_value_and_the_controllers_reading_are_named_apart() -> None:
    assert SIGNAL_LABELS["y"] == "plant output (true)"
    assert SIGNAL_LABELS["sent"] == "controller reads"
    assert len(set(SIGNAL_LABELS.values())) == len(SIGNAL_LABELS)
    assert set(SIGNAL_MEANINGS) == set(SIGNAL_LABELS)
    assert not any("measured" in label for label in SIGNAL_LABELS.values())


def test_exports_describe_columns_with_the_same_words() -> None:
    for prefix, label in SIGNAL_LABELS.items():
        assert PREFIX_DESCRIPTIONS[prefix] == label, prefix
    rig = load_rig(REPO / "configs" / "conveyor.toml")
    columns, units = tick_columns(rig)
    described = {c["name"]: c["description"] for c in column_info(rig, columns, units)}
    assert described["y:belt_speed"] == "plant output (true) belt_speed"
    assert described["sent:belt_speed"] == "controller reads belt_speed"
    assert described["cmd:voltage"] == "controller command voltage"
    assert described["u:voltage"] == "plant input (applied) voltage"


def test_the_report_groups_signals_with_the_same_words() -> None:
    from plantrig._plots import label

    for prefix in ("ref", "u", "y", "x", "cmd", "sent", "d"):
        assert label(f"{prefix}:belt_speed") == f"{SIGNAL_LABELS[prefix]} belt_speed"


def test_the_dashboard_uses_the_same_words() -> None:
    import plantrig.gui._view as view

    source = Path(view.__file__).read_text()
    assert "SIGNAL_LABELS" in source
    for old in ("measured", "sent to controller", "applied to plant", "commanded"):
        assert f'"{old}"' not in source


def test_docs_use_the_same_words() -> None:
    glossary = (REPO / "docs" / "glossary.md").read_text()
    dashboard = (REPO / "docs" / "dashboard.md").read_text()
    for prefix, label in SIGNAL_LABELS.items():
        row = re.search(rf"^\| `{prefix}:` \|.*$", glossary, re.M)
        assert row and label in row.group(0), prefix
    for label in (SIGNAL_LABELS["y"], SIGNAL_LABELS["sent"]):
        assert label in dashboard
    assert "sent to the controller)" not in dashboard and "the measured value" not in dashboard


def test_the_glossary_lists_every_reference_and_pid_key_and_every_verb() -> None:
    from plantrig.cli import build_parser
    from plantrig.sim.config._controller_settings import PID_KEYS
    from plantrig.sim.config._rigfile import REFERENCE_KEYS, RIG_KEYS

    glossary = (REPO / "docs" / "glossary.md").read_text()
    keys = set(RIG_KEYS) | set(PID_KEYS) | {k for ks in REFERENCE_KEYS.values() for k in ks}
    assert not [k for k in sorted(keys) if f"`{k}`" not in glossary]
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    assert not [v for v in sub.choices if f"`{v}`" not in glossary]  # type: ignore[union-attr]
    for old in ("anti_windup", "tracking_time", "interpolation", "u_min", "u_max"):
        assert old not in glossary


def test_the_glossary_link_row_lists_every_key_the_rig_checker_accepts() -> None:
    """Every [link] key of every kind (serial, MQTT, Modbus) and of its sub-tables."""
    from plantrig.sim.config._link_settings import COMMON_KEYS, LINK_KINDS
    from plantrig.sim.config._modbus_settings import REGISTER_KEYS
    from plantrig.sim.config._mqtt_settings import DEFAULT_QOS, TLS_KEYS

    glossary = (REPO / "docs" / "glossary.md").read_text()
    row = re.search(r"^\| `\[link\]` \|.*$", glossary, re.M)
    assert row
    tables = {"controller", "qos", "tls", "registers"}   # written as [link.<name>]
    keys = set(COMMON_KEYS) | set(LINK_KINDS) | {k for ks, _ in LINK_KINDS.values() for k in ks}
    keys |= set(REGISTER_KEYS) | set(DEFAULT_QOS) | set(TLS_KEYS)
    named = {k for k in keys - tables if f"`{k}`" in row.group(0)}
    assert sorted(keys - tables - named) == []
    named_tables = {t for t in tables if f"`[link.{t}]`" in glossary}
    assert named_tables == tables
