"""What `site-agent check` and `site-agent map suggest` do, kept out of the command-line module.

``check`` runs everything a request asks on the local data and shows, without signing, sending or writing
to the ledger, the exact release that would leave, the participant flow, and what the policy would
suppress. ``map suggest`` proposes a mapping file from the local columns and the values in them.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pyarrow.compute as pc

from federation.protocol import Schema, ValidationToolError, load_bundle
from federation.protocol.words import CALIBRATION_INTERCEPT, CALIBRATION_SLOPE, CELLS, OBSERVED_EXPECTED, WITHHELD

from .config import Site
from .mapping import suggest_mapping
from .runner import Preview
from .sources import SourceSpec, arrow_text, read_chunks

MAX_DISTINCT = 30


def source_from_args(site: Site | None, data: str | None, table: str | None, query: str | None) -> SourceSpec | None:
    """The source the command line names (``--data`` path or URL, ``--table``/``--query``), else None."""
    if data is None:
        if table is None and query is None:
            return None
        if site is None or site.data_url is None:
            raise ValidationToolError("--table/--query: give --data with a database URL (or [data].url in site.toml)")
        return SourceSpec(url=site.data_url, table=table, query=query)
    if "://" in data:
        if table is None and query is None and site is not None:
            table, query = site.data_table, site.data_query
        return SourceSpec(url=data, table=table, query=query)
    if table is not None or query is not None:
        raise ValidationToolError("--table/--query apply only to a database URL given with --data")
    return SourceSpec(path=Path(data))


def check_report(preview: Preview) -> dict[str, Any]:
    """The machine-readable account: the unsigned release, and which counts would be suppressed."""
    body = preview.release.body()
    body.pop("site_key_id", None)
    return {
        "release_unsigned": body,
        "flow": body["flow"],
        "suppressed": sorted(preview.protected.suppressed),
        "suppressed_by": preview.protected.rules,
        "cut_back": [dict(c) for c in preview.protected.cut_back],
        "counts": len(preview.counts.values),
        "derived_withheld": sorted(set(preview.counts.derived) - set(preview.protected.derived)),
        "signed": False,
        "sent": False,
    }


def format_check(preview: Preview) -> str:
    """A person-readable account of what would leave the site (nothing is signed or sent)."""
    release = preview.release
    flow = release.flow
    lines = [
        f"Preview of study {release.study_id}, request {release.request_id}: nothing was signed, sent or recorded.",
        "",
        "Participant flow",
        f"  records read                {_show(flow.get('read'))}",
    ]
    for reason, value in flow.get("excluded", {}).items():
        lines.append(f"  left out: {reason:<17} {_show(value)}")
    lines += [
        f"  analysed                    {_show(flow.get('analysed'))}",
        f"    with the condition        {_show(flow.get('analysed_positive'))}",
        f"    without the condition     {_show(flow.get('analysed_negative'))}",
        "",
        "Results that would be released",
    ]
    for table in release.confusion:
        lines.append(f"  screen result at threshold {table.threshold:g}:")
        for cell in ("tp", "fn", "fp", "tn"):
            lines.append(f"    {CELLS[cell]:<34} {_show(table.cells.get(cell))}")
    for name, result in release.extra.items():
        lines.append(f"  {name}: {_summary(name, result)}")
    for cut in preview.protected.cut_back:
        lines.append(f"Cut back: {cut['analysis']}: {cut['action']}, {cut['rule']}")
    hidden = sorted(preview.protected.suppressed)
    rules = preview.protected.rules
    lines += [
        "",
        f"Withheld by the site's rules (minimum cell size {release.policy.get('min_cell_size')}): {len(hidden)}",
    ]
    for name in hidden[:40]:
        lines.append(f"  {name} ({rules.get(name, 'audit').replace('_', ' ')})")
    if len(hidden) > 40:
        lines.append(f"  ... and {len(hidden) - 40} more (see --json)")
    withheld = sorted(set(preview.counts.derived) - set(preview.protected.derived))
    if withheld:
        lines.append(f"Statistics withheld because a count they rest on is withheld: {', '.join(withheld[:10])}")
    lines += ["", "The full release text: site-agent check ... --json; in plain words, once held: site-agent review"]
    return "\n".join(lines)


def _show(value: Any) -> str:
    return WITHHELD if value is None else str(value)


def _number(value: Any, digits: int) -> str:
    """A statistic to as many decimals as the coordinator's summary and report show it (AUC 3; O:E, kappa 2)."""
    return WITHHELD if value is None else f"{value:.{digits}f}"


def _summary(name: str, result: Any) -> str:
    if name == "roc":
        auc, se = _number(result["auc"], 3), _number(result["auc_se"], 3)
        return f"{len(result['bands'])} score bands, AUC {auc} (SE {se})"
    if name == "calibration":
        bands = result.get("bands", result.get("bins", []))
        return (
            f"{len(bands)} risk bands, {OBSERVED_EXPECTED} {_number(result['observed_expected_ratio'], 2)}, "
            f"{CALIBRATION_INTERCEPT} {_number(result.get('calibration_intercept'), 2)}, "
            f"{CALIBRATION_SLOPE} {_number(result['slope'], 2)}"
        )
    if name == "margin":
        return f"{len(result)} threshold(s), bands on each side of the threshold"
    if name == "agreement":
        if not result.get("available"):
            return result.get("reason", "not available")
        pairs = result["tables"][0]["pairs"]
        return ", ".join(f"kappa {pair} {_number(p['kappa'], 2)}" for pair, p in pairs.items())
    if name == "paired":
        return (
            f"AUC difference {_number(result['auc_difference'], 3)} (SE {_number(result['auc_difference_se'], 3)}), "
            "screen results of both models among participants with and without the condition"
        )
    if name == "subgroups":
        return ", ".join(f"{v['variable']} ({len(v['levels'])} levels)" for v in result["variables"])
    return json.dumps(result)[:200]


# --- map suggest -----------------------------------------------------------------------------------------


def sample_values(source: SourceSpec, rows: int) -> dict[str, list[str]]:
    """Distinct values (as text, at most 30 per column) of every column in the first ``rows`` records."""
    for batch in read_chunks(source, None, rows):
        values = {}
        for name in batch.schema.names:
            text = arrow_text(batch.column(name)).fill_null("")
            distinct = pc.unique(text)
            if len(distinct) > MAX_DISTINCT:
                distinct = distinct.slice(0, MAX_DISTINCT)
            values[name] = sorted(str(v) for v in distinct.to_pylist())
        return values
    raise ValidationToolError(f"{source.describe()}: no records")


def schema_for_suggest(site: Site | None, bundle_path: Path | None, schema_path: Path | None) -> Schema:
    if schema_path is not None:
        try:
            text = schema_path.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise ValidationToolError(f"{schema_path}: schema file not found") from None
        return Schema.from_toml(text, str(schema_path))
    if bundle_path is None or site is None:
        raise ValidationToolError("give --schema SCHEMA.toml, or --bundle with --site-dir (to verify the bundle)")
    try:
        data = bundle_path.read_bytes()
    except FileNotFoundError:
        raise ValidationToolError(f"{bundle_path}: bundle file not found") from None
    return load_bundle(data, site.trusted, str(bundle_path)).schema


def write_suggestion(source: SourceSpec, schema: Schema, out: Path, rows: int = 5000) -> list[str]:
    """Write the proposed mapping to ``out`` (never over an existing file) and return the notes."""
    if out.exists():
        raise ValidationToolError(f"{out}: already exists; refusing to overwrite a mapping a person may have confirmed")
    text, notes = suggest_mapping(sample_values(source, rows), schema)
    out.write_text(text, encoding="utf-8")
    return notes


__all__ = [
    "check_report",
    "format_check",
    "sample_values",
    "schema_for_suggest",
    "source_from_args",
    "write_suggestion",
]
