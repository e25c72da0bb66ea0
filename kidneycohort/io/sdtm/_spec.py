"""What a CDISC SDTM source is: a folder of domain datasets and the reading rules.

:class:`SdtmSource` is the option model of the SDTM reader; its fields are the keys of a
study config's ``data.source`` entry with ``kind: sdtm``.

Default lab test codes are SDTM controlled terminology ``LBTESTCD`` values (from memory:
``CREAT`` creatinine, ``CYSTC`` cystatin C, ``ALBCREAT`` albumin/creatinine ratio);
default procedure terms for kidney replacement therapy are our own spellings; a study
lists its own in ``test_codes`` and ``event_terms``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Final, Literal

from pydantic import Field, model_validator

from kidneycohort._rules import RuleModel

__all__ = ["DEFAULT_TEST_CODES", "SdtmSource"]

DEFAULT_TEST_CODES: Final[dict[str, Literal["creatinine", "cystatin_c", "uacr"]]] = {
    "CREAT": "creatinine",
    "CYSTC": "cystatin_c",
    "ALBCREAT": "uacr",
}
DEFAULT_EVENT_TERMS: Final[dict[str, Literal["dialysis", "transplant", "kidney_death"]]] = {
    "HEMODIALYSIS": "dialysis",
    "HAEMODIALYSIS": "dialysis",
    "PERITONEAL DIALYSIS": "dialysis",
    "DIALYSIS": "dialysis",
    "KIDNEY TRANSPLANT": "transplant",
    "KIDNEY TRANSPLANTATION": "transplant",
    "RENAL TRANSPLANT": "transplant",
}
DOMAINS: Final = ("dm", "lb", "ds", "ex", "pr")


class SdtmSource(RuleModel):
    """A folder of SDTM datasets as the study's source (config ``data.source``).

    Examples
    --------
    >>> SdtmSource(folder="sdtm").test_codes["CREAT"]
    'creatinine'
    """

    kind: Literal["sdtm"] = Field("sdtm", description="Source kind: CDISC SDTM datasets.")
    name: str = Field("sdtm", description="Label written to the `source` column of every row.")
    folder: str = Field(description="Folder holding the domain files (dm.xpt or dm.json, ...).")
    format: Literal["xpt", "json"] | None = Field(
        None,
        description="File format: SAS transport ('xpt') or Dataset-JSON ('json'); found "
        "from the files present when omitted.",
    )
    test_codes: dict[str, Literal["creatinine", "cystatin_c", "uacr"]] = Field(
        default_factory=lambda: dict(DEFAULT_TEST_CODES),
        description="LB.LBTESTCD -> analyte; other tests are not read.",
    )
    result: Literal["standard", "original"] = Field(
        "standard",
        description="Which LB result to read: 'standard' (LBSTRESN, else LBSTRESC, with "
        "LBSTRESU) or 'original' (LBORRES with LBORRESU); the other is kept as reported.",
    )
    partial_dates: Literal["reject", "first", "middle"] = Field(
        "reject",
        description="Rule for partial ISO 8601 dates (e.g. '2024-03'): 'reject' leaves "
        "them unimputed (lab rows rejected with reason partial_date), 'first' takes the "
        "earliest possible day, 'middle' 1 July / the 15th; every imputation is recorded.",
    )
    index: Literal["first_dose", "randomization", "reference_start"] = Field(
        "first_dose",
        description="The index date: first EX.EXSTDTC, the DS record DSDECOD = "
        "'RANDOMIZED', or DM.RFSTDTC.",
    )
    end_of_study_category: str = Field(
        "DISPOSITION EVENT",
        description="DS.DSCAT of the end-of-study records; their latest DSSTDTC ends follow-up.",
    )
    event_domain: Literal["PR", "CE", "MH"] = Field(
        "PR", description="Domain of dialysis and transplant records (its --DECOD/--TRT)."
    )
    event_terms: dict[str, Literal["dialysis", "transplant", "kidney_death"]] = Field(
        default_factory=lambda: dict(DEFAULT_EVENT_TERMS),
        description="Decoded term (upper case) -> event.",
    )
    lab_setting: Literal["outpatient", "inpatient", "emergency"] | None = Field(
        None,
        description="Care setting written on every lab row (SDTM LB has none); e.g. "
        "'outpatient' for scheduled central-laboratory visits.",
    )

    @model_validator(mode="after")
    def _codes_upper(self) -> SdtmSource:
        for code in self.test_codes:
            if code != code.upper() or len(code) > 8:
                raise ValueError(f"test_codes: '{code}' is not an LBTESTCD (upper case, <= 8)")
        return self

    def where(self) -> str:
        """How the source is named in messages."""
        return f"SDTM folder {self.folder}"

    def file(self, domain: str) -> Path | None:
        """The file of ``domain`` (``dm``, ``lb``, ...) in the folder, or None."""
        folder = Path(self.folder)
        suffixes = (".xpt", ".json") if self.format is None else (f".{self.format}",)
        for suffix in suffixes:
            for name in (domain.lower(), domain.upper()):
                path = folder / f"{name}{suffix}"
                if path.is_file():
                    return path
        return None
