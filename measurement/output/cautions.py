"""The cautions every report shows. The work can hurt people; these travel with every number."""

from __future__ import annotations


def cautions(min_group_size: int) -> list[str]:
    return [
        "Survey scores are for describing groups, not for decisions about individuals: do not "
        "use them to select, rate, reward or discipline any person. Report group results only "
        f"for groups of at least {min_group_size} respondents (the minimum set for this analysis).",
        "Statistical remedies for common-method variance bound the bias; they do not remove it. "
        "Measuring predictor and outcome from different sources or at different times is the "
        "stronger remedy (Podsakoff, MacKenzie, Lee & Podsakoff 2003; Podsakoff, MacKenzie & "
        "Podsakoff 2012).",
        "A corrected association from one cross-sectional survey is still not a causal effect: "
        "omitted causes, reverse causation and selection remain. Causal claims need an experiment "
        "or a valid instrument.",
        "Survey responses are personal data: follow local data-protection law and any employee "
        "representation agreements, and keep uploads and reports only as long as needed.",
        "These results support, and do not replace, the judgement of a qualified professional "
        "working under local law and licensed practice.",
    ]
