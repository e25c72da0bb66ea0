"""Variable metadata of the ADaM datasets and the checks every dataset passes.

Each analysis dataset is a polars frame plus one :class:`Variable` per column (name,
label, kind, origin, derivation). :func:`check_dataset` holds the frame to

* the SAS transport (XPORT) version 5 limits of SAS TS-140: dataset and variable names of
  at most 8 characters (letters, digits, underscore; not starting with a digit), labels of
  at most 40 characters, character values of at most 200 bytes;
* the labels the ADaM Implementation Guide gives its standard variables
  (:data:`ADAM_IG_LABELS`): a standard name must carry the standard label;
* ADaM's own conventions: flag variables hold "Y" (or "N") or are empty, ``PARAMCD`` is at
  most 8 characters, one row per key.

References
----------
.. [1] SAS Institute. TS-140: The record layout of a data set in SAS transport (XPORT)
   format (SAS technical support document).
.. [2] CDISC Analysis Data Model Team. ADaM Implementation Guide v1.3 (2021), section 3
   (ADSL and BDS variables).
.. [3] CDISC Analysis Data Model Team. The ADaM Basic Data Structure for Time-to-Event
   Analyses v1.0 (2012).
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Final, Literal

import polars as pl

from kidneycohort.errors import InputDataError

__all__ = [
    "ADAM_IG_LABELS",
    "AdamDataset",
    "Kind",
    "Variable",
    "check_dataset",
    "make_dataset",
    "spec_sheet",
    "standard",
]

Kind = Literal["text", "integer", "float", "date"]
Origin = Literal["Derived", "Assigned", "Predecessor"]

# SAS TS-140 (XPORT v5): 8-character names, 40-character labels, 200-byte text values.
MAX_NAME: Final = 8
MAX_LABEL: Final = 40
MAX_TEXT_BYTES: Final = 200
_NAME: Final = re.compile(r"^[A-Z_][A-Z0-9_]{0,7}$")

# Labels of the standard variables we use. Source: ADaM IG v1.3 section 3 and the ADaM
# BDS-TTE v1.0 document (from memory); the labels marked "pilot" were re-read in the CDISC
# ADaM pilot example datasets shipped with Dataset-JSON v1.1 (examples/adam), which use
# the IG labels.
ADAM_IG_LABELS: Final[dict[str, str]] = {
    "STUDYID": "Study Identifier",  # pilot
    "USUBJID": "Unique Subject Identifier",  # pilot
    "SUBJID": "Subject Identifier for the Study",  # pilot
    "SITEID": "Study Site Identifier",  # pilot
    "ARM": "Description of Planned Arm",  # pilot
    "ACTARM": "Description of Actual Arm",
    "TRT01P": "Planned Treatment for Period 01",  # pilot
    "TRT01PN": "Planned Treatment for Period 01 (N)",  # pilot
    "TRT01A": "Actual Treatment for Period 01",  # pilot
    "TRT01AN": "Actual Treatment for Period 01 (N)",  # pilot
    "TRTSDT": "Date of First Exposure to Treatment",  # pilot
    "TRTEDT": "Date of Last Exposure to Treatment",  # pilot
    "RANDDT": "Date of Randomization",
    "AGE": "Age",  # pilot
    "AGEU": "Age Units",  # pilot
    "SEX": "Sex",  # pilot
    "ITTFL": "Intent-To-Treat Population Flag",  # pilot
    "SAFFL": "Safety Population Flag",  # pilot
    "RANDFL": "Randomized Population Flag",
    "DTHFL": "Subject Death Flag",
    "DTHDT": "Date of Death",
    "EOSDT": "End of Study Date",
    "DCUTDT": "Data Cutoff Date",
    "TRTP": "Planned Treatment",  # pilot
    "TRTPN": "Planned Treatment (N)",  # pilot
    "TRTA": "Actual Treatment",  # pilot
    "TRTAN": "Actual Treatment (N)",  # pilot
    "PARAM": "Parameter",  # pilot
    "PARAMCD": "Parameter Code",  # pilot
    "PARAMN": "Parameter (N)",  # pilot
    "AVAL": "Analysis Value",  # pilot
    "BASE": "Baseline Value",  # pilot
    "CHG": "Change from Baseline",
    "PCHG": "Percent Change from Baseline",
    "ABLFL": "Baseline Record Flag",  # pilot
    "ANL01FL": "Analysis Flag 01",
    "ADT": "Analysis Date",  # pilot
    "ADY": "Analysis Relative Day",  # pilot
    "AVISIT": "Analysis Visit",  # pilot
    "AVISITN": "Analysis Visit (N)",  # pilot
    "ASEQ": "Analysis Sequence Number",
    "DTYPE": "Derivation Type",
    "STARTDT": "Time to Event Origin Date for Subject",  # pilot
    "CNSR": "Censor",  # pilot
    "EVNTDESC": "Event or Censoring Description",  # pilot
    "CNSDTDSC": "Censor Date Description",
    "SRCDOM": "Source Domain",  # pilot
    "SRCVAR": "Source Variable",  # pilot
    "SRCSEQ": "Source Sequence Number",  # pilot
}


@dataclass(frozen=True)
class Variable:
    """One variable of an analysis dataset.

    Attributes
    ----------
    name, label
        The variable name and label (SAS TS-140 limits; IG labels for IG names).
    kind
        ``"text"``, ``"integer"``, ``"float"`` or ``"date"`` (a SAS date number with the
        ``DATE9.`` format in XPT, an ISO 8601 text in Dataset-JSON).
    origin
        Define-XML origin type: ``"Derived"``, ``"Assigned"`` or ``"Predecessor"``.
    derivation
        How the value is obtained, in words (the spec sheet's derivation column).
    """

    name: str
    label: str
    kind: Kind
    origin: Origin
    derivation: str = ""

    @property
    def standard(self) -> bool:
        """Whether the name is a standard ADaM IG variable (its label is then fixed)."""
        return self.name in ADAM_IG_LABELS


def standard(name: str, kind: Kind, origin: Origin, derivation: str = "") -> Variable:
    """A standard variable, its label taken from :data:`ADAM_IG_LABELS`."""
    return Variable(name, ADAM_IG_LABELS[name], kind, origin, derivation)


@dataclass(frozen=True)
class AdamDataset:
    """An analysis dataset: name, label, rows and variable metadata (one per column).

    Attributes
    ----------
    name, label
        Dataset name (``ADSL``, ``ADEGFR``, ``ADTTE``) and label.
    data
        The rows, columns in the order of ``variables``.
    variables
        Metadata of each column.
    keys
        Variables that identify a row (the Dataset-JSON ``keySequence``).
    """

    name: str
    label: str
    data: pl.DataFrame
    variables: tuple[Variable, ...]
    keys: tuple[str, ...] = field(default_factory=tuple)

    def variable(self, name: str) -> Variable:
        """The metadata of variable ``name``."""
        return next(v for v in self.variables if v.name == name)


POLARS_TYPES: Final[dict[str, pl.DataType]] = {
    "text": pl.String(),
    "integer": pl.Int64(),
    "float": pl.Float64(),
    "date": pl.Date(),
}


def make_dataset(
    name: str,
    label: str,
    data: pl.DataFrame,
    variables: Sequence[Variable],
    keys: Sequence[str] = (),
) -> AdamDataset:
    """Build an :class:`AdamDataset`: columns ordered and typed by ``variables``, checked."""
    frame = data.select(pl.col(v.name).cast(POLARS_TYPES[v.kind]) for v in variables)
    dataset = AdamDataset(name, label, frame, tuple(variables), tuple(keys))
    check_dataset(dataset)
    return dataset


def text_lengths(dataset: AdamDataset) -> dict[str, int]:
    """Length of each text variable: its longest value in UTF-8 bytes (at least 1).

    Setting a character variable's length to its longest value is the FDA Study Data
    Technical Conformance Guide's recommendation (common practice in submissions).
    """
    texts = [v.name for v in dataset.variables if v.kind == "text"]
    if not texts:
        return {}
    row = dataset.data.select(
        pl.col(c).str.len_bytes().max().fill_null(1).alias(c) for c in texts
    ).row(0)
    return {c: max(1, int(n)) for c, n in zip(texts, row, strict=True)}


def check_dataset(dataset: AdamDataset) -> None:
    """Raise :class:`InputDataError` for the first rule the dataset breaks.

    Rules and their sources: names and label lengths (SAS TS-140, XPORT v5), standard
    labels (ADaM IG v1.3), text values of at most 200 bytes (SAS TS-140), flags "Y"/"N"
    or empty (ADaM IG v1.3, flag conventions), one row per key (ADaM IG v1.3).
    """
    where = f"ADaM {dataset.name}"
    if not _NAME.match(dataset.name):
        raise InputDataError(
            f"{where}: dataset name must be 1-8 capital letters, digits or '_' (SAS TS-140)"
        )
    _check_text(f"{where}: dataset label", dataset.label, MAX_LABEL)
    names = [v.name for v in dataset.variables]
    if names != dataset.data.columns:
        raise InputDataError(
            f"{where}: columns {dataset.data.columns} differ from metadata {names}"
        )
    _check_variables(where, dataset)
    _check_values(where, dataset, names)
    if dataset.keys and dataset.data.select(dataset.keys).is_duplicated().any():
        raise InputDataError(f"{where}: more than one row per key {', '.join(dataset.keys)}")


def _check_variables(where: str, dataset: AdamDataset) -> None:
    """Variable names and labels (SAS TS-140 XPORT v5; ADaM IG v1.3 standard labels)."""
    for v in dataset.variables:
        if not _NAME.match(v.name):
            raise InputDataError(
                f"{where}: variable name '{v.name}' is not 1-8 capital letters, digits or "
                "'_' starting with a letter (SAS TS-140 XPORT v5)"
            )
        _check_text(f"{where}.{v.name}: label", v.label, MAX_LABEL)
        if v.standard and v.label != ADAM_IG_LABELS[v.name]:
            raise InputDataError(
                f"{where}.{v.name}: label '{v.label}' differs from the ADaM IG label "
                f"'{ADAM_IG_LABELS[v.name]}'"
            )


def _check_values(where: str, dataset: AdamDataset, names: list[str]) -> None:
    """Text lengths (200 bytes), flag values and PARAMCD lengths."""
    for name, length in text_lengths(dataset).items():
        if length > MAX_TEXT_BYTES:
            raise InputDataError(
                f"{where}.{name}: a value of {length} bytes exceeds the 200-byte limit of "
                "SAS transport v5 (SAS TS-140); shorten it"
            )
    for name in (n for n in names if n.endswith("FL")):
        bad = dataset.data.filter(~pl.col(name).is_in(["Y", "N"]) & pl.col(name).is_not_null())
        if bad.height:
            raise InputDataError(
                f"{where}.{name}: flag value {bad[name][0]!r} is not 'Y', 'N' or empty "
                "(ADaM IG flag convention)"
            )
    if "PARAMCD" in names:
        long = dataset.data.filter(pl.col("PARAMCD").str.len_chars() > MAX_NAME)
        if long.height:
            raise InputDataError(
                f"{where}.PARAMCD: '{long['PARAMCD'][0]}' is longer than 8 characters (ADaM IG)"
            )


def _check_text(where: str, text: str, limit: int) -> None:
    if len(text) > limit:
        raise InputDataError(
            f"{where} '{text}' has {len(text)} characters; SAS transport v5 allows {limit} "
            "(SAS TS-140)"
        )
    if not text.isascii():
        raise InputDataError(f"{where} '{text}' is not plain ASCII (SAS transport v5)")


def spec_sheet(datasets: Sequence[AdamDataset]) -> pl.DataFrame:
    """The variable-level specification of ``datasets``: one row per variable.

    Columns: ``dataset``, ``dataset_label``, ``order``, ``variable``, ``label``, ``type``
    (``Char``/``Num`` as in SAS transport), ``length`` (text: longest value in bytes;
    numbers and dates: 8, the width of a SAS number), ``display_format`` (``DATE9.`` for
    dates), ``origin``, ``standard`` (``ADaM IG`` or ``sponsor``), ``key`` (key order or
    null) and ``derivation``.
    """
    rows = []
    for ds in datasets:
        lengths = text_lengths(ds)
        for order, v in enumerate(ds.variables, start=1):
            rows.append(
                {
                    "dataset": ds.name,
                    "dataset_label": ds.label,
                    "order": order,
                    "variable": v.name,
                    "label": v.label,
                    "type": "Char" if v.kind == "text" else "Num",
                    "length": lengths.get(v.name, 8),
                    "display_format": "DATE9." if v.kind == "date" else None,
                    "origin": v.origin,
                    "standard": "ADaM IG" if v.standard else "sponsor",
                    "key": ds.keys.index(v.name) + 1 if v.name in ds.keys else None,
                    "derivation": v.derivation,
                }
            )
    return pl.DataFrame(
        rows,
        schema={
            "dataset": pl.String,
            "dataset_label": pl.String,
            "order": pl.Int64,
            "variable": pl.String,
            "label": pl.String,
            "type": pl.String,
            "length": pl.Int64,
            "display_format": pl.String,
            "origin": pl.String,
            "standard": pl.String,
            "key": pl.Int64,
            "derivation": pl.String,
        },
    )
