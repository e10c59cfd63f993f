"""A held release in plain words, for a reviewer who is not a programmer (``site-agent review``).

Every number a release holds is a count of records that meet some conditions (its definition, kept in the
ledger beside the release), or a statistic computed from such counts. This module turns those
definitions into words ("analysed participants with the condition, score 0.5 or more"), lays the counts
of each analysis out as one short table (rows: what else the records have in common; columns: with the
condition, without the condition), says for each withheld count which rule withheld it and what the
coordinator could still tell about it (the audit's interval), and lists the abbreviations that remain.

It reads only what the ledger recorded when the release was prepared (the release text, the counts with
their definitions, why each count was withheld, the audit's result and the model's description), so the
page shows exactly what a person approves. Nothing here holds a value from a single record.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any

WITHHELD = "withheld"

ANALYSIS_TITLES = {
    "flow": "Participant flow",
    "confusion": "Screen result against the reference standard",
    "roc": "Scores in bands (for the ROC curve and the AUC)",
    "calibration": "Predicted risk against what was observed (calibration)",
    "margin": "Correct and wrong calls by distance from the threshold",
    "agreement": "Agreement with a second reference standard",
    "paired": "Two models on the same participants",
    "subgroups": "The same analyses within subgroups",
}

ANALYSIS_EXPLAINED = {
    "flow": "How many records were read, how many were left out and why, and how the participants analysed "
    "divide by the reference standard.",
    "confusion": "Participants analysed, by the model's screen result (screen + when the score is at or above "
    "the threshold) and by the reference standard.",
    "roc": "Participants analysed, by band of model score and by the reference standard. From these counts "
    "the coordinator draws the ROC curve.",
    "calibration": "Participants analysed, by band of the model's predicted risk and by the reference standard: "
    "how many had the condition in each band, against the number the predicted risks expect.",
    "margin": "Participants analysed, by how far their score lies from the threshold, and by the reference "
    "standard: close to the threshold the screen is wrong more often.",
    "agreement": "Participants analysed, by the screen result, the reference standard and a second reference standard.",
    "paired": "Participants analysed, by the screen result of this model and of the comparison model, and by the "
    "reference standard.",
    "subgroups": "The counts above, within each subgroup the request asked for (one table per subgroup).",
}

EXCLUSION_WORDS = {
    "duplicate_id": "the same participant id appeared again",
    "missing_outcome": "the reference standard result was missing",
    "missing_feature": "a model input was missing",
    "out_of_range": "a model input was outside its allowed range",
    "unknown_category": "a model input had a code the model does not know",
}

GLOSSARY = {
    "AUC": "area under the ROC curve: the chance that a random participant with the condition scores higher "
    "than a random participant without it (0.5 = no better than chance, 1 = perfect).",
    "O:E ratio": "observed over expected: participants with the condition, divided by the number the model's "
    "predicted risks expect (1 = as many as predicted).",
    "calibration intercept": "whether predicted risks are too high or too low on average (0 = neither).",
    "calibration slope": "whether predicted risks are too extreme or too modest (1 = neither).",
    "ROC": "receiver operating characteristic: sensitivity against 1 − specificity over every threshold.",
    "SHA-256": "a fingerprint of a file: any change to the file, however small, changes it.",
    "screen +": "the model's score is at or above the threshold: the screen says 'assess further'.",
    "screen −": "the model's score is below the threshold.",
    "reference standard": "the assessment that says whether a participant has the condition.",
    "threshold": "the score at or above which the screen is positive.",
    "withheld": "a count the site does not release, because it is small or would let a small count be worked out.",
    "minimum cell size": "the smallest count the site releases (smaller counts are withheld; zero may be shown).",
    "finest group": "records that every released count either takes together or leaves out together; every count "
    "is a sum of finest groups, and the audit checks what sums of them can be worked out.",
}


@dataclass
class Table:
    """One short table: a caption, what its numbers count, a header and rows of text."""

    caption: str
    explain: str
    header: list[str]
    rows: list[list[str]]


@dataclass
class Part:
    """One analysis of the release (or one subgroup of it): a title, sentences, tables."""

    key: str
    title: str
    sentences: list[str] = field(default_factory=list)
    tables: list[Table] = field(default_factory=list)
    children: list[Part] = field(default_factory=list)


# --- counts in words ---------------------------------------------------------------------------------------------


def _number(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:g}"
    return str(value)


def _range_words(what: str, low: Any, high: Any) -> str:
    if low is None and high is None:
        return f"any {what}"
    if low is None:
        return f"{what} under {_number(high)}"
    if high is None:
        return f"{what} {_number(low)} or more"
    return f"{what} from {_number(low)} to under {_number(high)}"


def condition_words(condition: dict[str, Any], analysis: str = "") -> str:
    """One condition of a count's definition in words (``{"variable": "outcome", "values": ["1"]}`` ...)."""
    variable = str(condition.get("variable", ""))
    values = [str(v) for v in condition.get("values", []) or []]
    if variable == "status":
        status = values[0] if values else ""
        if status == "analysed":
            return "analysed"
        reason = status.removeprefix("excluded:")
        return f"left out because {EXCLUSION_WORDS.get(reason, reason.replace('_', ' '))}"
    if variable == "outcome":
        return "with the condition" if values == ["1"] else "without the condition"
    if variable == "reference2":
        states = {"1": "positive", "0": "negative", "missing": "missing"}
        if sorted(values) == ["0", "1"]:
            return "second reference standard known"
        return "second reference standard " + " or ".join(states.get(v, v) for v in values)
    if variable in ("score", "score.compare"):
        model = "comparison model's score" if variable == "score.compare" else "score"
        if analysis == "calibration":
            model = "predicted risk"
        low, high = condition.get("low"), condition.get("high")
        # a 2x2 table's score condition is its threshold; a paired or agreement band's open end need not be
        if analysis == "confusion" and (low is None) != (high is None):
            sign = "screen +" if high is None else "screen −"
            prefix = "comparison model " if variable == "score.compare" else ""
            return f"{prefix}{sign} ({_range_words(model, low, high)})"
        return _range_words(model, low, high)
    label = variable.replace("_", " ")
    if values:
        return f"{label}: {', '.join(values)}"
    return _range_words(label, condition.get("low"), condition.get("high"))


def analysis_of(name: str) -> str:
    """``subgroups.sex[0].roc.band[2].positive`` -> ``subgroups``; ``confusion[0].tp`` -> ``confusion``."""
    return re.split(r"[.\[]", name, maxsplit=1)[0]


def inner_analysis(name: str) -> str:
    """The analysis a count belongs to within a subgroup (``subgroups.sex[0].roc...`` -> ``roc``)."""
    if not name.startswith("subgroups."):
        return analysis_of(name)
    parts = name.split(".")
    for part in parts[2:]:
        base = re.split(r"\[", part, maxsplit=1)[0]
        if base in ANALYSIS_TITLES:
            return base
    return "flow"


def count_words(count: dict[str, Any]) -> str:
    """A count's definition in words: "analysed, with the condition, score 0.5 or more"."""
    analysis = inner_analysis(str(count.get("name", "")))
    if analysis == "paired" and re.search(r"\.(joint|model_band|compare_band)\[", str(count.get("name", ""))):
        analysis = "paired bands"  # score bands, not screen results
    words = [condition_words(c, analysis) for c in count.get("where", [])]
    if words == ["analysed"]:
        return "participants analysed"
    words = [w for w in words if w != "analysed"] if "analysed" in words else words
    return "participants " + ", ".join(words) if words else "records read"


def _is_outcome(condition: dict[str, Any]) -> bool:
    return condition.get("variable") == "outcome"


def _is_subgroup(condition: dict[str, Any]) -> bool:
    return condition.get("variable") not in ("status", "outcome", "reference2", "score", "score.compare")


# --- tables ------------------------------------------------------------------------------------------------------


def _shown(value: Any) -> str:
    return WITHHELD if value is None else str(value)


def _pivot(counts: list[dict[str, Any]], analysis: str) -> Table | None:
    """Counts that differ only by the reference standard, as rows with two columns: with / without it."""
    rows: dict[str, dict[str, Any]] = {}
    order: list[str] = []
    single: list[list[str]] = []
    for count in counts:
        where = [c for c in count.get("where", []) if not _is_subgroup(c)]
        outcome = [c for c in where if _is_outcome(c)]
        rest = [c for c in where if not _is_outcome(c) and condition_words(c) != "analysed"]
        if not outcome:
            single.append([count_words({**count, "where": where}), _shown(count.get("value"))])
            continue
        label = "; ".join(condition_words(c, analysis) for c in rest) or "participants analysed"
        column = "with" if outcome[0].get("values") == ["1"] else "without"
        if column in rows.get(label, {}):
            # two counts the words cannot tell apart: each gets a row of its own, never one hidden behind the other
            single.append([count_words({**count, "where": where}), _shown(count.get("value"))])
            continue
        if label not in rows:
            rows[label] = {}
            order.append(label)
        rows[label][column] = count.get("value")
    title = ANALYSIS_TITLES.get(analysis, analysis.replace("_", " "))
    explain = ANALYSIS_EXPLAINED.get(analysis, "Counts of participants analysed.")
    if rows:
        body = [[label, _shown(rows[label].get("with")), _shown(rows[label].get("without"))] for label in order]
        body += [[label, value, ""] for label, value in single]
        return Table(title, explain, ["participants", "with the condition", "without the condition"], body)
    if single:
        return Table(title, explain, ["what it counts", "number"], single)
    return None


def _flow_table(counts: list[dict[str, Any]]) -> Table:
    by_name = {c["name"]: c for c in counts}
    rows: list[list[str]] = []
    if "flow.read" in by_name:
        rows.append(["records read", _shown(by_name["flow.read"].get("value"))])
    for count in counts:
        if count["name"].startswith("flow.excluded."):
            reason = count["name"].removeprefix("flow.excluded.")
            rows.append([f"left out: {EXCLUSION_WORDS.get(reason, reason)}", _shown(count.get("value"))])
    for name, label in (
        ("flow.analysed", "participants analysed"),
        ("flow.analysed_positive", "… of them with the condition"),
        ("flow.analysed_negative", "… of them without the condition"),
    ):
        if name in by_name:
            rows.append([label, _shown(by_name[name].get("value"))])
    return Table(ANALYSIS_TITLES["flow"], ANALYSIS_EXPLAINED["flow"], ["what it counts", "number"], rows)


def _statistic_sentences(analysis: str, result: Any) -> list[str]:
    """The statistics a site computed from its counts (AUC, O:E ratio ...), one sentence each."""
    if not isinstance(result, dict):
        return []
    out: list[str] = []

    def value(key: str) -> float | None:
        raw = result.get(key)
        return float(raw) if isinstance(raw, (int, float)) and not isinstance(raw, bool) else None

    if analysis == "roc" and value("auc") is not None:
        se = f" (standard error {value('auc_se'):.3f})" if value("auc_se") is not None else ""
        out.append(f"AUC {value('auc'):.3f}{se}, computed from the released band counts.")
    if analysis == "calibration":
        if value("observed") is not None and value("expected") is not None:
            ratio = value("observed_expected_ratio")
            ratio_text = f" (O:E ratio {ratio:.2f})" if ratio is not None else ""
            out.append(
                f"{value('observed'):g} participants with the condition against {value('expected'):.1f} that the "
                f"predicted risks expect{ratio_text}."
            )
        if value("calibration_intercept") is not None:
            out.append(f"Calibration intercept {value('calibration_intercept'):.2f}.")
        if value("slope") is not None:
            out.append(f"Calibration slope {value('slope'):.2f}.")
    if analysis == "agreement":
        for table in result.get("tables", []) if isinstance(result.get("tables"), list) else []:
            for pair, content in (table.get("pairs") or {}).items():
                kappa = content.get("kappa") if isinstance(content, dict) else None
                if isinstance(kappa, (int, float)) and not isinstance(kappa, bool):
                    se = content.get("kappa_se")
                    se_text = f" (standard error {se:.3f})" if isinstance(se, (int, float)) else ""
                    agreed = content.get("observed_agreement")
                    agreed_text = f", observed agreement {agreed:.3f}" if isinstance(agreed, (int, float)) else ""
                    out.append(f"Kappa, {pair.replace('_', ' and ')}: {kappa:.3f}{se_text}{agreed_text}.")
    if analysis == "paired":
        for key, words in (("auc_model", "AUC of the model"), ("auc_compare", "AUC of the comparison model")):
            if value(key) is not None:
                out.append(f"{words} {value(key):.3f}, computed from the released band counts.")
        if value("auc_difference") is not None:
            se = value("auc_difference_se")
            se_text = f" (standard error {se:.3f})" if se is not None else ""
            out.append(f"Difference of the two AUCs {value('auc_difference'):.3f}{se_text}.")
    return out


def _subgroup_label(condition: dict[str, Any]) -> str:
    return condition_words(condition)


def analysis_parts(facts: dict[str, Any], results: dict[str, Any]) -> list[Part]:
    """One part per analysis of the release, each with one short table; subgroups as one child per group."""
    counts = [c for c in facts.get("counts", []) if isinstance(c, dict) and "name" in c]
    grouped: dict[str, list[dict[str, Any]]] = {}
    for count in counts:
        grouped.setdefault(analysis_of(count["name"]), []).append(count)
    parts: list[Part] = []
    for analysis in sorted(grouped, key=lambda a: (list(ANALYSIS_TITLES).index(a) if a in ANALYSIS_TITLES else 99, a)):
        members = grouped[analysis]
        part = Part(analysis, ANALYSIS_TITLES.get(analysis, analysis.replace("_", " ")))
        if analysis == "flow":
            part.tables.append(_flow_table(members))
        elif analysis == "subgroups":
            part.sentences.append(ANALYSIS_EXPLAINED["subgroups"])
            part.children = _subgroup_parts(members)
        else:
            table = _pivot(members, analysis)
            if table is not None:
                part.tables.append(table)
            part.sentences += _statistic_sentences(analysis, results.get(analysis))
        parts.append(part)
    return parts


def _subgroup_parts(counts: list[dict[str, Any]]) -> list[Part]:
    groups: dict[str, list[dict[str, Any]]] = {}
    order: list[str] = []
    for count in counts:
        conditions = [c for c in count.get("where", []) if _is_subgroup(c)]
        label = "; ".join(_subgroup_label(c) for c in conditions) or "all subgroups added up"
        if label not in groups:
            groups[label] = []
            order.append(label)
        groups[label].append(count)
    children = []
    for label in order:
        child = Part(f"subgroup {label}", f"Subgroup: {label}")
        inner: dict[str, list[dict[str, Any]]] = {}
        for count in groups[label]:
            inner.setdefault(inner_analysis(count["name"]), []).append(count)
        for analysis, members in inner.items():
            table = _pivot(members, analysis)
            if table is not None:
                child.tables.append(table)
        children.append(child)
    return children


# --- withheld counts, in one sentence each -----------------------------------------------------------------------


def _interval_words(interval: dict[str, Any] | None) -> str:
    if not interval:
        return ""
    low, high = interval.get("low"), interval.get("high")
    span = f"{low} or more" if high is None else f"anywhere from {low} to {high}"
    told = "From everything the site has released, to this study and any other, a recipient can"
    if interval.get("exact", True):
        return f"{told} only tell it is {span}."
    return f"{told} tell no more than that it could be {span} (or in a wider range)."


_SECONDARY = re.compile(r"otherwise (\S+) could be recomputed from (\S+) = ")


def _rule_words(reason: str, describe: dict[str, str]) -> str:
    """Why a count was withheld, with any count names in the reason replaced by their words."""
    rule, _, detail = reason.partition(":")
    detail = detail.strip()
    for name in sorted(describe, key=len, reverse=True):
        if name in detail:
            detail = detail.replace(name, f"“{describe[name]}”")
    if rule == "primary":
        if detail.startswith("fewer than"):
            return f"it counts {detail} (below the site's minimum cell size)"
        return detail or "it is below the site's minimum cell size"
    if rule == "secondary":
        match = _SECONDARY.match(reason.partition(":")[2].strip())
        if match and match.group(1) in describe and match.group(2) in describe:
            return (
                f"withheld as well, so that “{describe[match.group(1)]}”, which is withheld, cannot be worked out "
                f"by subtraction from “{describe[match.group(2)]}”"
            )
        return f"withheld as well, to protect another withheld count: {detail}"
    if rule == "audit":
        return f"withheld after the disclosure audit: {detail}"
    if rule == "coarsened":
        return (
            "withheld because this part of the analysis was cut back, so that the main screen-result table could "
            "be released"
        )
    return reason


RULE_NAMES = {
    "primary": "below the minimum cell size",
    "secondary": "withheld as well, to protect another withheld count",
    "audit": "withheld after the disclosure audit",
    "coarsened": "the analysis was cut back",
}


@dataclass
class Withheld:
    """One withheld count: the part of the release it belongs to, the rule that withheld it, one sentence."""

    group: str
    rule: str
    text: str


def withheld_sentences(facts: dict[str, Any], review: dict[str, Any]) -> list[Withheld]:
    """One sentence per withheld count: what it counts, which rule withheld it, what can still be told."""
    counts = {c["name"]: c for c in facts.get("counts", []) if isinstance(c, dict) and "name" in c}
    describe = {name: _described(name, count) for name, count in counts.items()}
    audit = review.get("audit") or {}
    intervals = {i.get("name"): i for i in audit.get("intervals", []) if isinstance(i, dict)}
    out = []
    for name, reason in (review.get("suppressed") or {}).items():
        what = describe.get(name, "a count")
        sentence = f"{what[:1].upper()}{what[1:]}: {_rule_words(str(reason), describe)}."
        extra = _interval_words(intervals.get(name))
        rule = str(reason).partition(":")[0]
        group = ANALYSIS_TITLES.get(analysis_of(name), analysis_of(name))
        out.append(Withheld(group, RULE_NAMES.get(rule, rule), f"{sentence} {extra}".strip()))
    return out


def _described(name: str, count: dict[str, Any]) -> str:
    words = count_words(count)
    subgroup = [c for c in count.get("where", []) if _is_subgroup(c)]
    if name.startswith("flow.excluded."):
        reason = name.removeprefix("flow.excluded.")
        words = f"records left out because {EXCLUSION_WORDS.get(reason, reason)}"
    elif name == "flow.read":
        words = "records read"
    if subgroup and "subgroup" not in words:
        words += " (in the subgroup)"
    analysis = inner_analysis(name)
    if analysis not in ("flow", "subgroups"):
        words += f" ({TABLE_NAMES.get(analysis, analysis)})"
    return words


TABLE_NAMES = {
    "confusion": "screen-result table",
    "roc": "score-band table",
    "calibration": "predicted-risk table",
    "margin": "distance-from-threshold table",
    "agreement": "second-reference table",
    "paired": "two-model table",
}


def finding_sentences(facts: dict[str, Any], audit: dict[str, Any] | None) -> list[str]:
    """The audit's findings, with any count names in them replaced by what the counts count."""
    counts = {c["name"]: c for c in facts.get("counts", []) if isinstance(c, dict) and "name" in c}
    describe = {name: _described(name, count) for name, count in counts.items()}
    out = []
    for finding in (audit or {}).get("findings", []) or []:
        text = str(finding.get("text", "")) if isinstance(finding, dict) else str(finding)
        for name in sorted(describe, key=len, reverse=True):
            if name in text:
                text = text.replace(name, f"“{describe[name]}”")
        out.append(text)
    return out


def cut_back_sentences(review: dict[str, Any]) -> list[str]:
    """One sentence per analysis the site cut back so that its main table could be released."""
    out = []
    for cut in review.get("cut_back") or []:
        if not isinstance(cut, dict):
            continue
        analysis = str(cut.get("analysis", ""))
        title = ANALYSIS_TITLES.get(analysis_of(analysis), analysis.replace("_", " "))
        action = str(cut.get("action", "cut back"))
        rule = str(cut.get("rule", ""))
        out.append(f"{title}: {action}" + (f" ({rule})." if rule else "."))
    return out


def audit_sentence(audit: dict[str, Any] | None) -> str:
    """The audit's verdict in one sentence, without its internals."""
    if not audit:
        return "No audit result was recorded with this release."
    earlier = int(audit.get("releases_considered", 1) or 1) - 1
    scope = (
        f"this release together with the {earlier} earlier release{'s' if earlier != 1 else ''} of this site, "
        "to any study"
        if earlier
        else "this release"
    )
    width = audit.get("protection_width", 2)
    if audit.get("ok"):
        return (
            f"Passed. The site checked {scope}: it found no withheld count, and no small group of records, that "
            f"can be worked out from what was released; each withheld count could still be any of at least "
            f"{width} values."
        )
    return f"Failed. The site checked {scope}: a withheld count could be worked out (see below)."


def unsearched_sentences(audit: dict[str, Any] | None) -> list[str]:
    """What the audit's searches did not cover, one sentence each (threat model R14), and what no audit models
    (R12). Empty for an audit recorded before its searches were listed."""
    if not audit or "not_searched" not in audit:
        return []
    out = []
    for gap in audit.get("not_searched") or []:
        kind = gap.get("kind") if isinstance(gap, dict) else None
        if kind == "unions":
            parts, largest = int(gap.get("parts", 0)), int(gap.get("largest", 0))
            out.append(
                f"Not searched in full: whether {gap.get('size')} or more finest groups together could be worked "
                f"out, in {parts} set{'s' if parts != 1 else ''} of counts tied together (the largest ties "
                f"{largest} finest groups whose counts are not known); smaller unions were searched."
            )
        elif kind == "across_groups":
            out.append(
                f"Audited in {gap.get('groups')} parts (a long history): unions that take finest groups of two "
                "parts were not searched."
            )
        elif kind == "whole_numbers":
            narrow, stopped = int(gap.get("narrow", 0)), int(gap.get("atoms_stopped", 0))
            up_to, atoms_up_to = int(gap.get("withheld_up_to", 0)), int(gap.get("atoms_up_to", 0))
            decided = [f"withheld counts tied to at most {up_to} finest groups"] if up_to else []
            if atoms_up_to:
                decided.append(f"each finest group in a set of at most {atoms_up_to} tied together")
            out.append(
                f"Worked over real numbers and rounded, not by whole-number programs ({gap.get('atoms')} finest "
                f"groups, beyond the {gap.get('limit')} those programs take): a count that only whole numbers pin "
                "down was not searched for"
                + (f" ({' and '.join(decided)} were each decided over whole numbers)" if decided else "")
                + (
                    f"; {narrow} withheld count{'s' if narrow != 1 else ''} kept so few values that whole numbers "
                    "could matter"
                    if narrow
                    else ""
                )
                + (
                    f"; for {stopped} finest group{'s' if stopped != 1 else ''} the whole-number programs stopped "
                    "at their limit"
                    if stopped
                    else ""
                )
                + "."
            )
    if not out:
        out.append("Every search of the audit ran in full.")
    out.append(
        "Not modelled by any audit: what a recipient learns by rerunning the site's own algorithm on every table "
        "it cannot rule out (docs/threat-model.md, R12); the request caps and the approval of each release bound it."
    )
    return out


def glossary(text: str) -> list[tuple[str, str]]:
    """The glossary entries whose term appears in ``text``."""
    return [(term, meaning) for term, meaning in GLOSSARY.items() if term in text]
