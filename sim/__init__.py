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
    **dict.fromkeys(["build_chains"], "_chains"),
    **dict.fromkeys(["Clock", "VirtualClock", "WallClock"], "_clock"),
    **dict.fromkeys(["Command", "CommandInbox"], "_commands"),
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
        "_conditioning",
    ),
    **dict.fromkeys(["ControllerLink", "Event", "SignalChain"], "_contracts"),
    **dict.fromkeys(["OpenLoop", "Pid", "PidLoops", "StateFeedback"], "_controllers"),
    **dict.fromkeys(["ControllerSpec", "PidLoopSpec"], "_controller_settings"),
    **dict.fromkeys(["Engine", "RunOutcome", "build_controller", "tick_columns"], "_engine"),
    **dict.fromkeys(
        ["Checker", "RigFileError", "RigIssue", "describe_value", "did_you_mean", "one_of"],
        "_checker",
    ),
    **dict.fromkeys(["LinkSettings"], "_link_settings"),
    **dict.fromkeys(["REGISTER_TYPES"], "_modbus_settings"),
    **dict.fromkeys(["DEFAULT_QOS", "TlsSettings"], "_mqtt_settings"),
    **dict.fromkeys(["export_csv", "export_mat"], "_export"),
    **dict.fromkeys(
        ["DisturbanceSpec", "FAULT_KINDS", "FaultKind", "FaultSpec", "parse_fault"], "_faults"
    ),
    **dict.fromkeys(["InterlockSpec", "SafetySettings"], "_interlocks"),
    **dict.fromkeys(["LimitSpec"], "_limits"),
    **dict.fromkeys(["generate_keypair", "sign_folder", "verify_folder"], "_manifest"),
    **dict.fromkeys(
        ["AcceptanceRules", "EXIT_CODES", "EXIT_CODE_HELP", "OUTCOMES", "RuleResult"], "_outcome"
    ),
    **dict.fromkeys(
        ["apply_overrides", "load_rig_with_overrides", "shortcut_assignments"], "_overrides"
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
        "_plant",
    ),
    **dict.fromkeys(["RecordError"], "_preflight"),
    **dict.fromkeys(["rig_from_python", "write_rig"], "_rig_builder"),
    **dict.fromkeys(["RigDocument", "read_rig_document"], "_rig_document"),
    **dict.fromkeys(["RunRecord", "read_run"], "_reader"),
    **dict.fromkeys(["read_journal"], "_recorder"),
    **dict.fromkeys(["recover_run"], "_records"),
    **dict.fromkeys(["Ramp", "Sine", "Step", "Table"], "_references"),
    **dict.fromkeys(
        ["ModelNotLoaded", "load_rig_as_data", "model_module", "rig_from_record", "run_folder_of"],
        "_rigdata",
    ),
    **dict.fromkeys(
        [
            "NamedReference",
            "Rig",
            "Signal",
            "build_rig",
            "load_rig",
        ],
        "_rigfile",
    ),
    **dict.fromkeys(["RunData", "run_to_folder", "simulate", "simulate_inputs"], "_run"),
    **dict.fromkeys(
        ["Scenario", "ScenarioFileError", "build_scenario", "load_scenario"], "_scenario"
    ),
    **dict.fromkeys(["SECRET_MARK"], "_secrets"),
    **dict.fromkeys(["SIGNAL_LABELS", "SIGNAL_MEANINGS"], "_signal_labels"),
    **dict.fromkeys(["ModelSummary", "summarize"], "_summary"),
    **dict.fromkeys(["EventTape", "MemoryTape", "Tape", "TapeOverflow", "TapeReader"], "_tape"),
    **dict.fromkeys(["Verdict", "evaluate", "verdict_lines", "write_verdicts"], "_verdicts"),
    **dict.fromkeys(["silent_ticks_allowed"], "_watchdog"),
    **dict.fromkeys(["RerunError", "plan_rerun"], "_rerun"),
    **dict.fromkeys(
        [
            "Campaign",
            "CampaignFileError",
            "Case",
            "expand",
            "load_campaign",
            "with_verdicts",
        ],
        "_campaign_file",
    ),
    **dict.fromkeys(
        [
            "DERIVED",
            "MANIFEST",
            "ManifestError",
            "WrongPassphrase",
            "check_signature",
            "read_manifest",
            "read_signature",
            "sha256_file",
            "write_atomic",
        ],
        "_manifest",
    ),
    **dict.fromkeys(["DRAFT_MARK", "DRAFT_PREFIX", "Readiness", "check_folder"], "_signoff"),
    **dict.fromkeys(["RUN_START"], "_records"),
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
        "_compare",
    ),
    **dict.fromkeys(["machine_facts", "pacing_test"], "_readiness"),
    **dict.fromkeys(["COMPLETED", "EXIT_VERDICT"], "_outcome"),
    **dict.fromkeys(["Vector"], "_contracts"),
}

__all__ = sorted(_HOME)


__getattr__, __dir__ = lazy_names(__name__, _HOME, __all__)


if TYPE_CHECKING:  # type checkers and editors see every name where it lives
    from plantrig.sim._campaign_file import (
        Campaign,
        CampaignFileError,
        Case,
        expand,
        load_campaign,
        with_verdicts,
    )
    from plantrig.sim._chains import build_chains
    from plantrig.sim._checker import (
        Checker,
        RigFileError,
        RigIssue,
        describe_value,
        did_you_mean,
        one_of,
    )
    from plantrig.sim._clock import Clock, VirtualClock, WallClock
    from plantrig.sim._commands import Command, CommandInbox
    from plantrig.sim._compare import (
        NotComparable,
        Tolerance,
        Tolerances,
        compare_runs,
        iter_lines,
        load_tolerances,
        parse_tolerance_option,
    )
    from plantrig.sim._conditioning import (
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
    from plantrig.sim._contracts import ControllerLink, Event, SignalChain, Vector
    from plantrig.sim._controller_settings import ControllerSpec, PidLoopSpec
    from plantrig.sim._controllers import OpenLoop, Pid, PidLoops, StateFeedback
    from plantrig.sim._engine import Engine, RunOutcome, build_controller, tick_columns
    from plantrig.sim._export import export_csv, export_mat
    from plantrig.sim._faults import FAULT_KINDS, DisturbanceSpec, FaultKind, FaultSpec, parse_fault
    from plantrig.sim._interlocks import InterlockSpec, SafetySettings
    from plantrig.sim._limits import LimitSpec
    from plantrig.sim._link_settings import LinkSettings
    from plantrig.sim._manifest import (
        DERIVED,
        MANIFEST,
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
    from plantrig.sim._modbus_settings import REGISTER_TYPES
    from plantrig.sim._mqtt_settings import DEFAULT_QOS, TlsSettings
    from plantrig.sim._outcome import (
        COMPLETED,
        EXIT_CODE_HELP,
        EXIT_CODES,
        EXIT_VERDICT,
        OUTCOMES,
        AcceptanceRules,
        RuleResult,
    )
    from plantrig.sim._overrides import (
        apply_overrides,
        load_rig_with_overrides,
        shortcut_assignments,
    )
    from plantrig.sim._plant import (
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
    from plantrig.sim._preflight import RecordError
    from plantrig.sim._reader import RunRecord, read_run
    from plantrig.sim._readiness import machine_facts, pacing_test
    from plantrig.sim._recorder import read_journal
    from plantrig.sim._records import RUN_START, recover_run
    from plantrig.sim._references import Ramp, Sine, Step, Table
    from plantrig.sim._rerun import RerunError, plan_rerun
    from plantrig.sim._rig_builder import rig_from_python, write_rig
    from plantrig.sim._rig_document import RigDocument, read_rig_document
    from plantrig.sim._rigdata import (
        ModelNotLoaded,
        load_rig_as_data,
        model_module,
        rig_from_record,
        run_folder_of,
    )
    from plantrig.sim._rigfile import (
        NamedReference,
        Rig,
        Signal,
        build_rig,
        load_rig,
    )
    from plantrig.sim._run import RunData, run_to_folder, simulate, simulate_inputs
    from plantrig.sim._scenario import Scenario, ScenarioFileError, build_scenario, load_scenario
    from plantrig.sim._secrets import SECRET_MARK
    from plantrig.sim._signal_labels import SIGNAL_LABELS, SIGNAL_MEANINGS
    from plantrig.sim._signoff import DRAFT_MARK, DRAFT_PREFIX, Readiness, check_folder
    from plantrig.sim._summary import ModelSummary, summarize
    from plantrig.sim._tape import EventTape, MemoryTape, Tape, TapeOverflow, TapeReader
    from plantrig.sim._verdicts import Verdict, evaluate, verdict_lines, write_verdicts
    from plantrig.sim._watchdog import silent_ticks_allowed
