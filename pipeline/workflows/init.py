"""``ascertain init``: a new study folder to start from, which checks clean and builds.

A new analyst's first hour goes on finding which keys exist and what a working study looks
like. The folder written here answers both: a study file whose every key carries a comment,
one definition copied from the shipped library (a real, reviewed definition to imitate), one
skeleton definition listing every key a definition can use (the optional ones commented out),
and a README saying what to edit first. ``ascertain check FOLDER`` passes on it unchanged and
``ascertain build`` runs on the demo extract.

The folder must be new or empty: a study folder holds the user's edits, so init never replaces
a file, not even one an earlier init wrote. Writing goes through
:mod:`pipeline.outputs._ownership` (staged, then moved in whole), like every writing command.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

from pipeline.config._library import library_conditions
from pipeline.config._loader import load_condition_lists
from pipeline.errors import OutputFolderError
from pipeline.outputs._ownership import Owner, check_folder, install, staging

INIT = Owner("init", "ascertain-init.json")

COPIED = "type2_diabetes"
"""The library definition copied into a new study folder (it reads no other definition)."""

SKELETON = "gout"
"""The skeleton definition's name: a condition the shipped library does not define."""

STUDY_FILE = "study.yaml"

_STUDY = """\
# A study design, written by `ascertain init`; edit it, then run `ascertain check .` here.
# Windows are day offsets from the index date, both ends included: [-365, -1] is the year
# before index without the index day.
# study: lower case letters, digits and _; it names the outputs
study: {name}
title: Incident type 2 diabetes and gout after a first encounter in 2015-2016 (edit me)
# extract: the extract folder, relative to this file (build --extract overrides it)
extract: {extract}
definitions: definitions              # the case definitions, relative to this file
# library: true                       # instead of definitions: the library shipped with ascertain
# measures: [measures]               # your own measure files (e.g. serum urate), beside the shipped
end_of_data: 2019-12-31               # events after this date are not used

index:                                # one strategy only:
  first_encounter:                    # the first encounter in the window
    between: [2015-01-01, 2016-12-31]
    # type: [consultation]            # only encounters of these types
  # fixed_date: 2016-01-01            # the same calendar date for everyone
  # first_event: {{between: [2015-01-01, 2016-12-31], condition: type2_diabetes}}
  # random_encounter: {{between: [2015-01-01, 2016-12-31], seed: 7}}

eligibility:                          # applied in this order, one attrition line each
  - sex: [F, M]
  - alive_at_index: true
  - age: {{between: [40, 85]}}          # completed years at index
  - history_days: 730                 # first encounter at least this many days before index
  # - registered_days: 365            # registered at least this many days before index
  # - encounters: {{at_least: 2, window: [-730, -1]}}
  # - practice: [P01, P02]
  # - not_prevalent: type2_diabetes
  # - no_evidence: {{evidence: {{prescription: {{atc: [A10A]}}}}, window: [-365, 0]}}
  # - in_contact_at_index: {{window: [-365, 0]}}
  - at_risk_of_any_outcome: true      # not prevalent for every outcome at index

covariates:                           # baseline columns of cohort.parquet
  hba1c: {{latest: hba1c, window: [-730, 0]}}   # also mean, minimum, maximum of a measure
  visits_prior_year: {{count: {{encounter: {{}}}}, window: [-365, -1]}}
  # diabetes_at_index: {{condition: type2_diabetes}}       # onset on or before index
  # years_with_diabetes: {{days_since_first_evidence: type2_diabetes}}
  # charlson: {{charlson: {{weights: charlson_1987, codes: [ICD10]}}}}

outcomes:
  conditions: [{copied}, {skeleton}]   # definitions followed for incidence, side by side
  horizon_days: 1461                  # or horizon_years: 4
  lookback: all                       # or days of evidence before index that make a prevalent case
  # lookback_by_outcome: {{gout: 1825}}
  # clear_before: {{type2_diabetes: 365}}   # evidence this close before index: not at risk

followup:
  end_at: [death, end_of_data, lost_contact, horizon]   # the order breaks ties; also deregistration
  lost_contact_after_days: 365        # no contact for this long ends follow-up
  incomplete: censor                  # or exclude: drop those whose follow-up ends early
  # contact: encounters               # or any_activity

output:
  folder: output                      # relative to this file; build --out overrides it
  small_cell_threshold: 5             # counts below this are hidden in the report

# persontime:                        # also write persontime.parquet, for the report's rates
#   age_bands: [40, 50, 60, 70, 80]   # lower bounds; the first not above the age step's
#   calendar_year: true               # split at 1 January
#   since_index_years: [0, 1, 3]      # optional: whole years since index
# quality:
#   max_share_set_aside: 0.5          # more than this share of a table set aside stops a build
#   accept_set_aside: [{{table: encounters, reason: unparseable date}}]
# engine: {{threads: 2, memory_limit: 2GB}}
"""

_SKELETON = """\
# A skeleton case definition, written by `ascertain init`: every key a definition can use,
# the optional ones commented out. Replace the codes and rules with your own, then run
# `ascertain check --explain .` to read back what it means.
condition: gout                       # lower case letters, digits and _; names the columns
title: Gout (skeleton)
about: >
  A skeleton to edit, not a validated definition: one gout code on two distinct days within
  two years, or one code and a urate-lowering drug within a year. Validate any definition
  against chart review in your own data before relying on it.
provenance:
  adapts: "our own skeleton"          # the published algorithm adapted, or "our own"
  icd_edition: "ICD-10 (WHO) and ICD-9-CM"
  version: "0.1"
  date: 2026-12-05
evidence:                             # named pieces of evidence, one kind each
  gout_code:
    diagnosis:                        # codes match by prefix after upper case, no dots
      ICD10: [M10]                    # ranges too: [M10-M11]
      ICD9: ["274"]                   # quote codes: 274 unquoted is a number and refused
      # exclude: {ICD10: [M10.4]}     # codes under an included prefix that do not count
      # source: [billing, problem_list, visit]
  urate_lowering:
    prescription:
      atc: [M04AA]                    # one value may stand for a list: atc: M04AA
      # exclude: [M04AA03]
      # min_days: 28                  # prescriptions lasting at least this long
  # high_urate:                       # evidence no rule uses is reported by check
  #   measurement: {measure: hba1c, at_least: 6.5 %}   # or above, below, at_most, between
  # gp_visit:
  #   encounter: {type: [consultation]}
  # diabetes:
  #   condition: type2_diabetes       # another definition's onset as evidence
rules:                                # a case from the first day any rule is met
  - name: two gout codes
    need: {gout_code: 2}              # how many events of each evidence
    distinct_days: true
    within_days: 730                  # all within this many days of each other
  - name: code and urate-lowering drug
    need: {gout_code: 1, urate_lowering: 1}
    within_days: 365
    # apart_at_least_days: 90         # persistence: events at least this far apart
    # absent: [diabetes]              # evidence that must not occur ...
    # absent_window: [null, 365]      # ... in these days around the day the rule is met
onset: rule_met                       # or first_evidence
"""

_README = """\
# {name}

Written by `ascertain init`. What to edit first:

1. `{study}`: point `extract:` at your extract folder (or pass `--extract` to `build`), then set
   the index window, the eligibility steps, the outcomes and `end_of_data`. Every key has a
   comment; commented-out lines show the other choices.
2. `definitions/{skeleton}.yaml`: a skeleton definition with every key a definition can use.
   Replace its codes and rules, or copy it to start a definition of your own.
3. `definitions/{copied}.yaml`: a copy of the definition shipped with ascertain, to read as an
   example or adapt; its codes are in `codelists/` (a CSV of codes and terms to review in a
   spreadsheet, and a `.list.yaml` header with the list's source, edition and licence). A study
   with `library: true` instead of `definitions:` reads the whole shipped library without
   copying it.

Then, from this folder:

    ascertain check . --explain     # what each definition means, and any problem
    ascertain build {study}         # writes {output}/
    ascertain report {output}

`ascertain-init.json` lists the files init wrote; it is safe to delete.
Code lists shared between definitions are not yet supported.
"""


def _extract_text(extract: Path | None, folder: Path) -> str:
    """The study's ``extract:`` value: relative to the new folder when it can be."""
    if extract is None:
        return "extract"
    try:
        text = os.path.relpath(extract.resolve(), folder.resolve())
    except ValueError:  # another drive on Windows: no relative path exists
        text = str(extract.resolve())
    return Path(text).as_posix()


def init_study(folder: Path, *, extract: Path | None = None) -> list[Path]:
    """Write a new study folder: a study file, two definitions and a README.

    Args:
        folder: A new or empty folder; its name becomes the study's name when it is one
            (lower case letters, digits and ``_``), else ``my_study``.
        extract: The extract the study reads, written relative to the folder; without it
            ``extract: extract`` (a folder beside the study file, or ``build --extract``).

    Returns:
        The files written, in the folder.

    Raises:
        OutputFolderError: The folder holds anything, or is a file.
    """
    if folder.is_dir() and any(folder.iterdir()):
        shown = ", ".join(sorted(p.name for p in folder.iterdir())[:8])
        raise OutputFolderError(
            f"{folder} is not empty (it holds {shown}). Nothing was written: `ascertain init` "
            "writes only into a new or empty folder, so it never replaces a study you edited"
        )
    check_folder(folder, INIT)
    name = folder.resolve().name
    name = name if re.fullmatch(r"[a-z][a-z0-9_]*", name) else "my_study"
    files = {
        STUDY_FILE: _STUDY.format(
            name=name, extract=_extract_text(extract, folder), copied=COPIED, skeleton=SKELETON
        ),
        f"definitions/{SKELETON}.yaml": _SKELETON,
        "README.md": _README.format(
            name=name, study=STUDY_FILE, copied=COPIED, skeleton=SKELETON, output="output"
        ),
    }
    source = library_conditions() / f"{COPIED}.yaml"
    copied = {f"definitions/{COPIED}.yaml": source.read_bytes()}
    # its code lists too, where it names them (../codelists/ beside definitions/)
    for uses in load_condition_lists(source)[1].values():
        for use in uses:
            for file in use.code_list.files:
                copied[f"codelists/{file.name}"] = file.read_bytes()
    with staging(folder) as staged:
        (staged / "definitions").mkdir()
        (staged / "codelists").mkdir()
        for relative, data in copied.items():
            (staged / relative).write_bytes(data)
        for relative, text in files.items():
            (staged / relative).write_text(text, encoding="utf-8")
        names = [*files, *copied]
        install(staged, folder, INIT, names)
    return [folder / n for n in sorted(names)]
