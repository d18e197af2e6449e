"""Plant models, the tick engine, the tape and run records (no device I/O).

This is what other parts of plantrig (and users' scripts) may use; everything else in
this package is private.

Names load on first use (PEP 562): `import plantrig.sim` costs almost nothing, so a
process that needs only a few of them (the recorder, a link worker, `plantrig --help`)
does not import the rest.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from plantrig._lazy import lazy_names

# the module (under plantrig.sim) each public name lives in
_HOME: dict[str, str] = {
    **dict.fromkeys(["build_chains"], "engine._chains"),
    **dict.fromkeys(["Clock", "VirtualClock", "WallClock"], "engine._clock"),
    **dict.fromkeys(["Command", "CommandInbox"], "engine._commands"),
    **dict.fromkeys(
        [
            "ActuatorChain",
            "ActuatorChannel",
            "ChainSpecError",
            "SensorChain",
            "SensorChannel",
            "build_actuator_chain",
            "build_sensor_chain",
            "counts_to_eng",
            "eng_to_counts",
        ],
        "engine._conditioning",
    ),
    **dict.fromkeys(["BY_COMMAND", "ControllerLink", "Event", "SignalChain"],
                    "engine._contracts"),
    **dict.fromkeys(["OpenLoop", "Pid", "PidLoops", "StateFeedback"], "model._controllers"),
    **dict.fromkeys(["ControllerSpec", "PidLoopSpec"], "config._controller_settings"),
    **dict.fromkeys(["Engine", "RunOutcome", "build_controller", "tick_columns"], "engine._engine"),
    **dict.fromkeys(
        ["Checker", "RigFileError", "RigIssue", "describe_value", "did_you_mean", "one_of"],
        "config._checker",
    ),
    **dict.fromkeys(["LinkSettings"], "config._link_settings"),
    **dict.fromkeys(["REGISTER_TYPES"], "config._modbus_settings"),
    **dict.fromkeys(["DEFAULT_QOS", "TlsSettings"], "config._mqtt_settings"),
    **dict.fromkeys(["decimate_minmax", "minmax_bands", "thin_rows"], "records._envelope"),
    **dict.fromkeys(["export_csv", "export_mat"], "records._export"),
    **dict.fromkeys(
        ["DisturbanceSpec", "FAULT_KINDS", "FaultKind", "FaultSpec", "parse_fault"],
        "faults._faults",
    ),
    **dict.fromkeys(["ESTOP", "InterlockSpec", "SafetySettings"], "safety._interlocks"),
    **dict.fromkeys(["LimitSpec"], "safety._limits"),
    **dict.fromkeys(["generate_keypair", "sign_folder", "verify_folder"], "records._manifest"),
    **dict.fromkeys(
        ["AcceptanceRules", "EXIT_CODES", "EXIT_CODE_HELP", "OUTCOMES", "RuleResult"],
        "engine._outcome",
    ),
    **dict.fromkeys(
        ["apply_overrides", "load_rig_with_overrides", "shortcut_assignments"], "config._overrides"
    ),
    **dict.fromkeys(
        [
            "DiscretePlant",
            "LinearPlant",
            "LinearStepper",
            "ModelError",
            "OdePlant",
            "OdeStepper",
            "Plant",
            "from_state_space_object",
            "make_stepper",
            "zoh",
        ],
        "model._plant",
    ),
    **dict.fromkeys(["RecordError"], "records._preflight"),
    **dict.fromkeys(["rig_from_python", "write_rig"], "config._rig_builder"),
    **dict.fromkeys(["RigDocument", "read_rig_document"], "config._rig_document"),
    **dict.fromkeys(
        ["DISPLAY_ROWS", "RunRecord", "column_parts", "read_for_display", "read_run"],
        "records._reader",
    ),
    **dict.fromkeys(["read_journal"], "records._recorder"),
    **dict.fromkeys(["recover_run"], "records._records"),
    **dict.fromkeys(["Ramp", "Sine", "Step", "Table"], "model._references"),
    **dict.fromkeys(
        ["ModelNotLoaded", "load_rig_as_data", "model_module", "rig_from_record", "run_folder_of"],
        "config._rigdata",
    ),
    **dict.fromkeys(
        [
            "NamedReference",
            "Rig",
            "Signal",
            "build_rig",
            "load_rig",
        ],
        "config._rigfile",
    ),
    **dict.fromkeys(["RunData", "run_to_folder", "simulate", "simulate_inputs"], "engine._run"),
    **dict.fromkeys(
        ["Scenario", "ScenarioFileError", "build_scenario", "load_scenario"], "scenario._scenario"
    ),
    **dict.fromkeys(["SECRET_MARK"], "records._secrets"),
    **dict.fromkeys(["SIGNAL_LABELS", "SIGNAL_MEANINGS"], "records._signal_labels"),
    **dict.fromkeys(["ModelSummary", "summarize"], "model._summary"),
    **dict.fromkeys(
        [
            "EventTape",
            "MemoryTape",
            "Tape",
            "TapeOverflow",
            "TapeReader",
        ],
        "records._tape",
    ),
    **dict.fromkeys(
        [
            "Verdict",
            "evaluate",
            "verdict_lines",
            "write_verdicts",
        ],
        "scenario._verdicts",
    ),
    **dict.fromkeys(["silent_ticks_allowed"], "engine._watchdog"),
    **dict.fromkeys(["RerunError", "plan_rerun"], "records._rerun"),
    **dict.fromkeys(
        [
            "Campaign",
            "CampaignFileError",
            "Case",
            "expand",
            "load_campaign",
            "with_verdicts",
        ],
        "config._campaign_file",
    ),
    **dict.fromkeys(
        [
            "DERIVED",
            "MANIFEST",
            "KeyFileError",
            "ManifestError",
            "WrongPassphrase",
            "check_signature",
            "read_manifest",
            "read_signature",
            "sha256_file",
            "write_atomic",
        ],
        "records._manifest",
    ),
    **dict.fromkeys(
        [
            "DRAFT_MARK",
            "DRAFT_PREFIX",
            "Readiness",
            "check_folder",
            "verify_problem",
        ],
        "records._signoff",
    ),
    **dict.fromkeys(["RUN_START"], "records._records"),
    **dict.fromkeys(
        [
            "NotComparable",
            "Tolerance",
            "Tolerances",
            "compare_runs",
            "iter_lines",
            "load_tolerances",
            "parse_tolerance_option",
        ],
        "records._compare",
    ),
    **dict.fromkeys(["machine_facts", "pacing_test"], "engine._readiness"),
    **dict.fromkeys(["c_library"], "engine._realtime"),
    **dict.fromkeys(["COMPLETED", "EXIT_VERDICT"], "engine._outcome"),
    **dict.fromkeys(["Vector"], "engine._contracts"),
}

__all__ = sorted(_HOME)


__getattr__, __dir__ = lazy_names(__name__, _HOME, __all__)


if TYPE_CHECKING:  # type checkers and editors see every name where it lives
    from plantrig.sim.config._campaign_file import (
        Campaign,
        CampaignFileError,
        Case,
        expand,
        load_campaign,
        with_verdicts,
    )
    from plantrig.sim.config._checker import (
        Checker,
        RigFileError,
        RigIssue,
        describe_value,
        did_you_mean,
        one_of,
    )
    from plantrig.sim.config._controller_settings import ControllerSpec, PidLoopSpec
    from plantrig.sim.config._link_settings import LinkSettings
    from plantrig.sim.config._modbus_settings import REGISTER_TYPES
    from plantrig.sim.config._mqtt_settings import DEFAULT_QOS, TlsSettings
    from plantrig.sim.config._overrides import (
        apply_overrides,
        load_rig_with_overrides,
        shortcut_assignments,
    )
    from plantrig.sim.config._rig_builder import rig_from_python, write_rig
    from plantrig.sim.config._rig_document import RigDocument, read_rig_document
    from plantrig.sim.config._rigdata import (
        ModelNotLoaded,
        load_rig_as_data,
        model_module,
        rig_from_record,
        run_folder_of,
    )
    from plantrig.sim.config._rigfile import (
        NamedReference,
        Rig,
        Signal,
        build_rig,
        load_rig,
    )
    from plantrig.sim.engine._chains import build_chains
    from plantrig.sim.engine._clock import Clock, VirtualClock, WallClock
    from plantrig.sim.engine._commands import Command, CommandInbox
    from plantrig.sim.engine._conditioning import (
        ActuatorChain,
        ActuatorChannel,
        ChainSpecError,
        SensorChain,
        SensorChannel,
        build_actuator_chain,
        build_sensor_chain,
        counts_to_eng,
        eng_to_counts,
    )
    from plantrig.sim.engine._contracts import (
        BY_COMMAND,
        ControllerLink,
        Event,
        SignalChain,
        Vector,
    )
    from plantrig.sim.engine._engine import Engine, RunOutcome, build_controller, tick_columns
    from plantrig.sim.engine._outcome import (
        COMPLETED,
        EXIT_CODE_HELP,
        EXIT_CODES,
        EXIT_VERDICT,
        OUTCOMES,
        AcceptanceRules,
        RuleResult,
    )
    from plantrig.sim.engine._readiness import machine_facts, pacing_test
    from plantrig.sim.engine._realtime import c_library
    from plantrig.sim.engine._run import RunData, run_to_folder, simulate, simulate_inputs
    from plantrig.sim.engine._watchdog import silent_ticks_allowed
    from plantrig.sim.faults._faults import (
        FAULT_KINDS,
        DisturbanceSpec,
        FaultKind,
        FaultSpec,
        parse_fault,
    )
    from plantrig.sim.model._controllers import OpenLoop, Pid, PidLoops, StateFeedback
    from plantrig.sim.model._plant import (
        DiscretePlant,
        LinearPlant,
        LinearStepper,
        ModelError,
        OdePlant,
        OdeStepper,
        Plant,
        from_state_space_object,
        make_stepper,
        zoh,
    )
    from plantrig.sim.model._references import Ramp, Sine, Step, Table
    from plantrig.sim.model._summary import ModelSummary, summarize
    from plantrig.sim.records._compare import (
        NotComparable,
        Tolerance,
        Tolerances,
        compare_runs,
        iter_lines,
        load_tolerances,
        parse_tolerance_option,
    )
    from plantrig.sim.records._envelope import decimate_minmax, minmax_bands, thin_rows
    from plantrig.sim.records._export import export_csv, export_mat
    from plantrig.sim.records._manifest import (
        DERIVED,
        MANIFEST,
        KeyFileError,
        ManifestError,
        WrongPassphrase,
        check_signature,
        generate_keypair,
        read_manifest,
        read_signature,
        sha256_file,
        sign_folder,
        verify_folder,
        write_atomic,
    )
    from plantrig.sim.records._preflight import RecordError
    from plantrig.sim.records._reader import (
        DISPLAY_ROWS,
        RunRecord,
        column_parts,
        read_for_display,
        read_run,
    )
    from plantrig.sim.records._recorder import read_journal
    from plantrig.sim.records._records import RUN_START, recover_run
    from plantrig.sim.records._rerun import RerunError, plan_rerun
    from plantrig.sim.records._secrets import SECRET_MARK
    from plantrig.sim.records._signal_labels import SIGNAL_LABELS, SIGNAL_MEANINGS
    from plantrig.sim.records._signoff import (
        DRAFT_MARK,
        DRAFT_PREFIX,
        Readiness,
        check_folder,
        verify_problem,
    )
    from plantrig.sim.records._tape import EventTape, MemoryTape, Tape, TapeOverflow, TapeReader
    from plantrig.sim.safety._interlocks import ESTOP, InterlockSpec, SafetySettings
    from plantrig.sim.safety._limits import LimitSpec
    from plantrig.sim.scenario._scenario import (
        Scenario,
        ScenarioFileError,
        build_scenario,
        load_scenario,
    )
    from plantrig.sim.scenario._verdicts import Verdict, evaluate, verdict_lines, write_verdicts
