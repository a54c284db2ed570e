"""NWB file-level metadata of a clampcore recording: session, subject, devices, electrode.

Missing subject/session/electrode details get clear placeholders (nwbinspector
calls a missing Subject, age or sex critical), named in the descriptions and
listed in the file's metadata document (``placeholders``).

A model cell has no species. nwbinspector (``check_subject_species_form``, a
best-practice violation) accepts a Latin binomial or an NCBI Taxonomy term IRI,
and the NWB best practices ask for the species of the subject, not a free text.
For the simulated rig and the offline simulation the subject is therefore given
the NCBI Taxonomy term "synthetic construct" (taxon 32630, from memory: the
taxonomy's node for things made rather than sampled from an organism), and the
description says plainly that there is no animal; a species the experiment file
gives in that form is kept, any other text moves into the description.

Public names: ``new_nwbfile``, ``read_metadata``, ``SIMULATED_SOURCES``,
``SYNTHETIC_SPECIES``, and the small text helpers the writer shares (``dumps``,
``nwb_name``, ``unique``, ``text``, ``table``, ``flatten_numbers``, ``version``).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import re
import uuid
from collections.abc import Mapping
from importlib import metadata as _metadata
from typing import Any

import numpy as np

from clampcore.journal import _json_default as journal_json_default

SIMULATED_SOURCES = ("offline simulation", "simulated rig")
# NCBI Taxonomy "synthetic construct" (taxid 32630), as the term IRI nwbinspector accepts.
SYNTHETIC_SPECIES = "http://purl.obolibrary.org/obo/NCBITaxon_32630"
# nwbinspector's accepted species forms (its check_subject_species_form): a Latin binomial
# (two or more words, the first capitalised) or an NCBI Taxonomy term IRI.
_SPECIES_FORM = re.compile(
    r"[A-Z][a-z]+ [a-z]+( [a-z]+)?|http://purl\.obolibrary\.org/obo/NCBITaxon_\d+"
)


def version() -> str:
    try:
        return _metadata.version("clampcore")
    except _metadata.PackageNotFoundError:
        return "unknown"


def _json_default(value: Any) -> Any:
    try:
        return journal_json_default(value)
    except TypeError:
        return repr(value)  # never fail a recording over one odd metadata value


def dumps(value: Any, indent: int | None = None) -> str:
    return json.dumps(value, default=_json_default, indent=indent, ensure_ascii=False)


def nwb_name(text: str) -> str:
    """An HDF5/NWB-safe object name: no slashes, backslashes or colons."""
    cleaned = re.sub(r"[/\\:]", "_", str(text)).strip()
    return cleaned or "unnamed"


def unique(name: str, taken: set[str]) -> str:
    candidate, number = name, 2
    while candidate in taken:
        candidate = f"{name}_{number}"
        number += 1
    taken.add(candidate)
    return candidate


def table(meta: Mapping[str, Any], key: str) -> dict:
    experiment = meta.get("experiment")
    if not isinstance(experiment, Mapping):
        return {}
    value = experiment.get(key)
    return dict(value) if isinstance(value, Mapping) else {}


def text(value: Any) -> str | None:
    if value is None:
        return None
    if isinstance(value, str):
        return value.strip() or None
    return str(value)


def flatten_numbers(value: Any, prefix: str = "") -> list[tuple[str, float]]:
    """``{"a": {"b": 1}}`` -> ``[("a.b", 1.0)]``; non-numeric leaves are skipped."""
    out: list[tuple[str, float]] = []
    if isinstance(value, Mapping):
        for key, item in value.items():
            out += flatten_numbers(item, f"{prefix}.{key}" if prefix else str(key))
    elif isinstance(value, int | float | np.integer | np.floating) and not isinstance(value, bool):
        out.append((prefix, float(value)))
    return out


def _subject(meta: Mapping[str, Any], simulated: bool, placeholders: list[str]) -> Any:
    from pynwb.file import Subject

    given = table(meta, "subject")
    if simulated:
        defaults = {
            "subject_id": "simulated-cell",
            "species": SYNTHETIC_SPECIES,
            "description": "No animal: a model cell simulated by clampcore "
            f"({meta.get('source', 'simulation')}); species is NCBI Taxonomy's "
            "'synthetic construct'.",
        }
    else:
        defaults = {
            "subject_id": "unspecified",
            "species": "unspecified",
            "description": "Placeholder: the experiment file gave no subject description; "
            "fill it in before sharing this file.",
        }
    # nwbinspector calls a missing age or sex critical: "P0D/" is the ISO 8601 open range
    # "0 days or older" (nwbinspector's range form), "U" is NWB's code for unknown sex.
    defaults.update({"age": "P0D/", "sex": "U"})
    kwargs: dict[str, str] = {}
    missing: list[str] = []
    for key in ("subject_id", "species", "age", "sex", "description"):
        value = text(given.get(key))
        if value is None:
            value = defaults[key]
            missing.append(key)
        kwargs[key] = value
    moved = ""
    if simulated and not _SPECIES_FORM.fullmatch(kwargs["species"]):
        moved = f" The experiment file called it '{kwargs['species']}'."
        kwargs["species"] = SYNTHETIC_SPECIES
    kwargs["description"] += moved
    # A model cell's species is no placeholder: it is what the file says it is.
    others = [k for k in missing if k != "description" and not (simulated and k == "species")]
    if others:
        kwargs["description"] += f" Placeholder values: {', '.join(others)}."
    placeholders += [f"subject.{key}" for key in missing]
    for key in ("strain", "genotype", "weight"):
        value = text(given.get(key))
        if value is not None:
            kwargs[key] = value
    return Subject(**kwargs)


def _resistance_text(value: Any) -> str | None:
    """``"7.5 MOhm"`` from a number of MOhm; 0, negative or missing means not measured."""
    if isinstance(value, bool) or value is None:
        return None
    if isinstance(value, int | float | np.integer | np.floating):
        return f"{float(value):g} MOhm" if math.isfinite(value) and value > 0 else None
    return text(value)


def _experimenter(value: Any) -> list[str] | None:
    if value is None:
        return None
    if isinstance(value, str):
        return [value] if value.strip() else None
    if isinstance(value, list | tuple):
        names = [str(v) for v in value if str(v).strip()]
        return names or None
    return [str(value)]


def new_nwbfile(meta: Mapping[str, Any], complete: bool, placeholders: list[str]) -> tuple:
    """``(nwbfile, electrode)``: the file with its session, subject, devices and electrode.

    Placeholders used are appended to ``placeholders``.
    """
    source = text(meta.get("source")) or "unspecified source"
    simulated = source in SIMULATED_SOURCES
    nwbfile = _session(meta, source, complete, placeholders)
    nwbfile.subject = _subject(meta, simulated, placeholders)
    device = _devices(nwbfile, meta, source)
    electrode = _electrode(nwbfile, meta, device, simulated, placeholders)
    return nwbfile, electrode


def _session(meta: Mapping[str, Any], source: str, complete: bool, placeholders: list[str]) -> Any:
    """The NWBFile with the session's metadata (experiment file text in stimulus_notes)."""
    from pynwb import NWBFile

    session = table(meta, "session")
    written_by = version()
    description = text(session.get("description"))
    if description is None:
        description = f"Dynamic-clamp recording made with clampcore ({source})."
        placeholders.append("session.description")
    experiment_text = meta.get("experiment_text")
    if not isinstance(experiment_text, str) or not experiment_text.strip():
        experiment_text = None
    return NWBFile(
        session_description=description,
        identifier=str(uuid.uuid4()),
        session_start_time=_dt.datetime.fromisoformat(meta["session_start"]),
        experimenter=_experimenter(session.get("experimenter")),
        lab=text(session.get("lab")),
        institution=text(session.get("institution")),
        session_id=text(session.get("session_id")),
        experiment_description=(
            "Dynamic clamp: clampcore computed the current of virtual conductances from the "
            "measured membrane potential, sample by sample, and injected it in current clamp. "
            "The experiment file is in stimulus_notes."
        ),
        keywords=["dynamic clamp", "current clamp", "virtual conductance"],
        stimulus_notes=experiment_text
        or "No experiment file text was recorded; see data_collection for the metadata.",
        notes=(
            f"Recorded by clampcore {written_by} from {source}. data_collection holds the run's "
            "metadata as JSON (amplifier calibration, board, loop-timing statistics, summary, "
            "and how each journal column is stored)."
            + ("" if complete else " Recovered from a journal that did not end normally.")
        ),
        was_generated_by=[["clampcore", written_by]],
    )


def _devices(nwbfile: Any, meta: Mapping[str, Any], source: str) -> Any:
    """The board (returned: the electrode's device) and, when calibrated, the amplifier."""
    from pynwb.device import Device

    amplifier = table(meta, "amplifier")
    board = meta.get("board")
    board_text = f" Board: {dumps(board)}." if board else ""
    device = nwbfile.create_device(
        name="clampcore board",
        description=f"Serial DAQ board driven by clampcore; source: {source}.{board_text}",
    )
    if amplifier:
        nwbfile.add_device(
            Device(
                name="amplifier",
                description=f"Patch-clamp amplifier; calibration used: {dumps(amplifier)}",
            )
        )
    return device


def _electrode(
    nwbfile: Any, meta: Mapping[str, Any], device: Any, simulated: bool, placeholders: list[str]
) -> Any:
    """The intracellular electrode, with placeholders where the experiment file gave none."""
    from pynwb.icephys import IntracellularElectrode

    electrode_meta = table(meta, "electrode")
    electrode_description = text(electrode_meta.get("description"))
    if electrode_description is None:
        electrode_description = (
            "Virtual electrode of the simulated rig (placeholder)."
            if simulated
            else "Patch pipette (placeholder: the experiment file gave no electrode description)."
        )
        placeholders.append("electrode.description")
    location = text(electrode_meta.get("location"))
    if location is None and simulated:
        location = "in silico (placeholder)"
        placeholders.append("electrode.location")
    cell_id = text(electrode_meta.get("cell_id"))
    if cell_id is None and simulated:
        cell_id = nwbfile.subject.subject_id
    electrode = IntracellularElectrode(
        name="electrode",
        device=device,
        description=electrode_description,
        location=location,
        resistance=_resistance_text(electrode_meta.get("resistance_MOhm")),
        cell_id=cell_id,
    )
    nwbfile.add_icephys_electrode(electrode)
    return electrode


def read_metadata(nwbfile: Any) -> dict[str, Any]:
    """What :func:`new_nwbfile` stored, read back: ``subject``, ``session``, ``electrode``
    (dicts) and ``experiment_text``."""
    subject = nwbfile.subject
    electrode = next(iter(nwbfile.icephys_electrodes.values()), None)
    return {
        "experiment_text": nwbfile.stimulus_notes,
        "subject": {
            key: getattr(subject, key, None)
            for key in ("subject_id", "species", "age", "sex", "description")
        },
        "session": {
            "description": nwbfile.session_description,
            "session_id": nwbfile.session_id,
            "session_start": nwbfile.session_start_time.isoformat(),
            "experimenter": list(nwbfile.experimenter or []),
            "lab": nwbfile.lab,
            "institution": nwbfile.institution,
        },
        "electrode": {
            key: getattr(electrode, key, None)
            for key in ("description", "location", "resistance", "cell_id")
        },
    }
