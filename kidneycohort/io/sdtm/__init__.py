"""CDISC SDTM as a source: DM, LB, DS, EX (and PR) from SAS transport or Dataset-JSON
files, read into kidneycohort's canonical raw tables (``read_sdtm``)."""

from kidneycohort.io.sdtm._dates import PARTIAL_DATE_RULES, impute, is_partial, iso_datetime
from kidneycohort.io.sdtm._read import SdtmTables, read_domain, read_sdtm
from kidneycohort.io.sdtm._spec import DEFAULT_TEST_CODES, SdtmSource

__all__ = [
    "DEFAULT_TEST_CODES",
    "PARTIAL_DATE_RULES",
    "SdtmSource",
    "SdtmTables",
    "impute",
    "is_partial",
    "iso_datetime",
    "read_domain",
    "read_sdtm",
]
