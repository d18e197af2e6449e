"""Saying so before plantrig runs code that came with a file: an ODE rig's model module.

An ODE plant is a Python module, and importing it runs whatever it holds. check, run,
rerun, demo and controller print the module's path and SHA-256 before they import it.
A module named by a rig file inside a run folder, or lying in one, came with a record
from somewhere else (docs/security.md); it is imported only when

- the folder is signed, its signature verifies with the public key the user gives
  (rerun --public-key) and the module's SHA-256 is the one the signed manifest lists:
  the key's holder vouches for that code; or
- the user accepts it explicitly with --trust-model, after reading it.

Otherwise the command refuses (exit 2) and says what it found: a module changed since
the run, one the manifest does not list, an unsigned folder (anyone could have
rewritten module and manifest together), a signature that does not verify.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from plantrig.sim import (
    ManifestError,
    RigFileError,
    apply_overrides,
    check_signature,
    read_manifest,
    read_rig_document,
    read_signature,
    run_folder_of,
    sha256_file,
)

TRUST_HELP = ("import a model module that came with a run folder even though no signature "
              "vouches for it (someone else's code: read it first)")


def model_to_load(rig_path: str | Path, overrides: Sequence[str] = ()) -> Path | None:
    """The Python file an ODE rig file (with ``overrides`` applied) names as its model,
    resolved; None for other plants or a rig file that cannot be read (loading it then
    reports the mistake)."""
    path = Path(rig_path)
    try:
        doc = read_rig_document(path).doc   # a part may give the plant
        if overrides:
            doc = apply_overrides(doc, overrides, str(path))
    except RigFileError:
        return None
    plant = doc.get("plant")
    if not isinstance(plant, dict):
        return None
    kind = plant.get("kind")
    if not isinstance(kind, str):
        return None
    key = {"ode": "module", "fmu": "file"}.get(kind)    # an FMU's binary is code too
    if key is None or not isinstance(plant.get(key), str):
        return None
    return (path.parent / plant[key]).resolve()


def model_guard(rig_path: str | Path, *, overrides: Sequence[str] = (), trust: bool = False,
                public_key: str | Path | None = None, from_folder: Path | None = None
                ) -> str | None:
    """Print which model module will be imported and its SHA-256; the reason to refuse
    (None: go ahead).

    ``from_folder``: the run folder the rig file came from, when the caller knows it
    (rerun); otherwise the folder holding the rig file or the module, if any.
    """
    module = model_to_load(rig_path, overrides)
    if module is None or not module.is_file():
        return None         # no module, or loading the rig reports the missing file
    digest = sha256_file(module)
    record = from_folder or run_folder_of(rig_path) or run_folder_of(module)
    fmu = module.suffix.lower() == ".fmu"
    said = f"model {'FMU' if fmu else 'module'} {module} (SHA-256 {digest})"
    if record is None:
        print(f"loading {said}: this runs its code")
        return None
    vouched, finding = _evidence(record, module, digest, public_key)
    if vouched:
        print(f"loading {said}: {finding}; this runs its code")
        return None
    if trust:
        print(f"loading {said} (--trust-model): it came with the run folder {record}; "
              f"{finding}; this runs its code")
        return None
    return (f"plant.{'file' if fmu else 'module'}: {said} came with the run folder {record}; "
            f"{finding}. Loading it would run that code. Read it, then pass --trust-model to "
            "load it anyway")


def _evidence(record: Path, module: Path, digest: str,
              public_key: str | Path | None) -> tuple[bool, str]:
    """(vouched for, what the record says about the module)."""
    try:
        rel = module.relative_to(record.resolve()).as_posix()
    except ValueError:
        return False, "it lies outside the run folder, so the folder's manifest cannot vouch " \
                      "for it"
    try:
        manifest = read_manifest(record)
    except ManifestError as exc:
        return False, f"the folder's manifest cannot vouch for it ({exc})"
    entry = manifest.files.get(rel)
    if entry is None:
        return False, "the folder's manifest does not list it"
    if entry["sha256"] != digest:
        return False, (f"it changed since the run: the folder's manifest lists SHA-256 "
                       f"{entry['sha256']}")
    if not (record / "manifest.sig").exists():
        return False, ("it matches the folder's manifest, but the folder is not signed, "
                       "so anyone could have rewritten both")
    try:
        doc, _ = read_signature(record)
        if public_key is None:
            return False, (f"it matches the folder's manifest, signed by key "
                           f"{doc['public_key_sha256']}, but no public key was given to "
                           "check that signature")
        status, detail = check_signature(record, Path(public_key))
    except ManifestError as exc:
        return False, f"the folder's signature cannot be checked ({exc})"
    if status != "valid":
        return False, f"the folder's signature does not verify ({detail})"
    return True, f"it matches the folder's manifest, whose signature verifies ({detail})"
