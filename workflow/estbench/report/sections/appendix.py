"""Section 7, appendix: environment, the study file as run, the shard table."""

from __future__ import annotations

from estbench.report import data as report_data
from estbench.report.model import ReportModel
from estbench.report.sections.base import SectionInputs

#: The entry of the page's table of contents.
TITLE = "Appendix: study file, environment, shards"
#: The name the template gives this section's content.
KEY = "appendix"

#: Shards listed in the appendix; the rest are counted.
SHARDS_LISTED = 500


def appendix(model: ReportModel, con) -> dict:
    shards, total = report_data.shard_list(con, SHARDS_LISTED)
    return {"environments": report_data.environments(con), "shards": shards, "shards_total": total,
            "study_yaml": model.study["study_yaml"]}


def build(inputs: SectionInputs) -> dict:
    return appendix(inputs.model, inputs.con)
