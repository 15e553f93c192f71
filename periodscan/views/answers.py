"""Any design's ``plan`` answer in words or as JSON, chosen by the answer's type.

Designs answer different planning questions (:meth:`periodscan.designs.Design.plan`); each
answer type registers its text and JSON views here, so the ``plan`` verb never asks which
design it is reading.
"""

from __future__ import annotations

from functools import singledispatch
from typing import Any

from periodscan.analysis.onset_plan import EpochAnswer
from periodscan.analysis.planner import PlanAnswer
from periodscan.analysis.variant_plan import VariantAnswers, VariantPlan
from periodscan.views.onset import epoch_plan_json, format_epoch_plan
from periodscan.views.plan import format_plan, plan_json
from periodscan.views.variants import (
    format_variant_answers,
    format_variant_plan,
    variant_answers_json,
    variant_plan_json,
)


@singledispatch
def answer_text(answer: Any) -> str:
    """The answer as readable text."""
    raise TypeError(f"no text view for a {type(answer).__name__}")


@singledispatch
def answer_json(answer: Any) -> str:
    """The answer as a JSON string."""
    raise TypeError(f"no JSON view for a {type(answer).__name__}")


answer_text.register(PlanAnswer, format_plan)
answer_json.register(PlanAnswer, plan_json)
answer_text.register(EpochAnswer, format_epoch_plan)
answer_json.register(EpochAnswer, epoch_plan_json)
answer_text.register(VariantPlan, format_variant_plan)
answer_json.register(VariantPlan, variant_plan_json)
answer_text.register(VariantAnswers, format_variant_answers)
answer_json.register(VariantAnswers, variant_answers_json)
