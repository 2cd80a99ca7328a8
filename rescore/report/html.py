"""The report as one self-contained HTML page: no network, no external assets.

Every id, transcript and metadata value is escaped; a Content-Security-Policy admits only
the page's own inline script (by hash) and inline styles, so even an escaping slip could
not run foreign code or fetch anything.
"""

from __future__ import annotations

import base64
import hashlib
import json
import unicodedata
from collections.abc import Iterable, Sequence
from html import escape

from rescore.report import plots
from rescore.report import wording as t
from rescore.report.breakdown import Confusion
from rescore.report.build import Report
from rescore.report.confidence import CONFIDENCE_CAUTION, confidence_lines, confidence_rows
from rescore.report.rows import UtteranceRow
from rescore.wer import Alignment

_CSS = """
:root { --ok:#2f7d4f; --bad:#b3261e; --muted:#5f6670; --line:#d9dde3; }
* { box-sizing: border-box; }
body { font: 14px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, sans-serif;
       margin: 0; color: #1d2127; background: #f6f7f9; }
header, main, footer { max-width: 1100px; margin: 0 auto; padding: 0 24px; }
header { padding-top: 20px; }
h1 { font-size: 22px; margin: 0 0 4px; }
h2 { font-size: 17px; margin: 28px 0 10px; border-bottom: 1px solid var(--line);
     padding-bottom: 4px; }
h3 { font-size: 14px; margin: 14px 0 6px; }
.sub-title { color: var(--muted); margin: 0 0 12px; }
.card { background: #fff; border: 1px solid var(--line); border-radius: 8px; padding: 14px;
        margin-bottom: 14px; }
.row { display: flex; gap: 14px; flex-wrap: wrap; align-items: flex-start; }
.row > .card { flex: 1 1 320px; }
table { border-collapse: collapse; width: 100%; }
th, td { text-align: left; padding: 4px 8px; border-bottom: 1px solid var(--line);
         vertical-align: top; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
table.headline td.num { font-size: 15px; font-weight: 600; }
.better { color: var(--ok); } .worse { color: var(--bad); }
.gate { padding: 10px 14px; border-radius: 8px; margin-bottom: 14px; font-weight: 600; }
.gate.pass { background: #e3f3e8; color: var(--ok); }
.gate.fail { background: #fbe5e3; color: var(--bad); }
figure { margin: 0; } figure svg { max-width: 100%; height: auto; }
ul.notes { margin: 0; padding-left: 18px; color: var(--muted); }
.controls { display: flex; gap: 10px; align-items: center; margin-bottom: 8px; }
.controls input { flex: 1; padding: 6px 8px; border: 1px solid var(--line); border-radius: 6px; }
.controls select { padding: 6px; }
ol.utts { list-style: none; padding: 0; margin: 0; }
li.utt { background: #fff; border: 1px solid var(--line); border-radius: 6px;
         padding: 8px 10px; margin-bottom: 6px; }
li.utt[hidden] { display: none; }
.uid { font-family: ui-monospace, monospace; font-weight: 600; }
.change { float: right; font-variant-numeric: tabular-nums; }
table.words td { border: 0; padding: 1px 6px; }
table.words td:first-child { color: var(--muted); width: 70px; }
.w-sub { background: #fde7c7; border-bottom: 2px solid #e69a28; }
ins { background: #dceefe; text-decoration: none; border-bottom: 2px solid #3b82c4; }
del { background: #fbe0de; color: var(--bad); }
.legend span { margin-right: 10px; }
footer { color: var(--muted); padding-bottom: 30px; }
.caution { background: #fff7e0; border: 1px solid #eed58c; color: #5c4700;
           border-radius: 8px; padding: 12px 14px; margin: 0 0 14px; }
.warning { background: #fbe5e3; border: 1px solid #e8a9a3; color: var(--bad);
           border-radius: 8px; padding: 10px 14px; margin-bottom: 14px; }
code { font-family: ui-monospace, monospace; font-size: 12px; word-break: break-all; }
.kinds { display: flex; height: 12px; min-width: 120px; background: #f1f1f1; }
.kinds span, .key { display: inline-block; height: 12px; }
.key { width: 12px; vertical-align: middle; margin-right: 4px; }
.k-sub { background: #e69a28; } .k-del { background: #c4453b; } .k-ins { background: #3b82c4; }
th.sort { cursor: pointer; user-select: none; }
th.sort[aria-sort="ascending"]::after { content: " \\25B2"; }
th.sort[aria-sort="descending"]::after { content: " \\25BC"; }
"""

_SCRIPT = """
(function () {
  var box = document.getElementById('utt-filter');
  var pick = document.getElementById('utt-show');
  var shown = document.getElementById('utt-count');
  var items = Array.prototype.slice.call(document.querySelectorAll('li.utt'));
  function keep(li, want) {
    var c = Number(li.getAttribute('data-change'));
    if (want === 'changed') { return c !== 0; }
    if (want === 'improved') { return c < 0; }
    if (want === 'worsened') { return c > 0; }
    if (want === 'unchanged') { return c === 0; }
    return true;
  }
  function update() {
    var q = box.value.toLowerCase();
    var want = pick.value;
    var n = 0;
    items.forEach(function (li) {
      var ok = keep(li, want) && (!q || li.textContent.toLowerCase().indexOf(q) >= 0);
      li.hidden = !ok;
      if (ok) { n += 1; }
    });
    shown.textContent = n + ' of ' + items.length + ' shown';
  }
  box.addEventListener('input', update);
  pick.addEventListener('change', update);
  update();
  /* sortable tables: a click (or Enter) on a heading sorts by that column, again reverses */
  Array.prototype.forEach.call(document.querySelectorAll('table.sortable'), function (tbl) {
    var heads = Array.prototype.slice.call(tbl.querySelectorAll('th.sort'));
    var body = tbl.tBodies[0];
    function cell(tr, k) {
      var td = tr.cells[k];
      var v = td.getAttribute('data-value');
      if (v === null) { v = td.textContent; }
      return heads[k].classList.contains('num') ? Number(v) : v;
    }
    function sortBy(k) {
      var down = heads[k].getAttribute('aria-sort') !== 'descending';
      var rows = Array.prototype.slice.call(body.rows).map(function (tr, i) {
        return [cell(tr, k), i, tr];
      });
      rows.sort(function (a, b) {
        if (a[0] === b[0]) { return a[1] - b[1]; }
        var c = a[0] < b[0] ? -1 : 1;
        return down ? -c : c;
      });
      heads.forEach(function (h) { h.setAttribute('aria-sort', 'none'); });
      heads[k].setAttribute('aria-sort', down ? 'descending' : 'ascending');
      rows.forEach(function (r) { body.appendChild(r[2]); });
    }
    heads.forEach(function (h, k) {
      h.addEventListener('click', function () { sortBy(k); });
      h.addEventListener('keydown', function (e) { if (e.key === 'Enter') { sortBy(k); } });
    });
  });
})();
"""


# added to the page only when a transcript has a step the scoring rules counted as correct
_RULES_CSS = """
.w-eqv { border-bottom: 2px dotted #5a8f5a; }
.w-opt { color: #777; font-style: italic; }
"""
_RULES_LEGEND = ('<span class="w-eqv">equivalent under the rules</span>'
                 '<span class="w-opt">(optional, left out)</span>')
_RULED = frozenset({"equivalent", "optional"})
_RIGHT_TO_LEFT = frozenset({"R", "AL"})  # Unicode bidirectional classes of RTL letters


def _dir(words: Iterable[str]) -> str:
    """``dir="auto"`` for text holding right-to-left letters, so the browser lays it out
    from its first strong character (Hebrew, Arabic) instead of the page's left-to-right;
    left-to-right text is laid out the same either way and keeps its bytes."""
    return ' dir="auto"' if any(unicodedata.bidirectional(c) in _RIGHT_TO_LEFT
                                for w in words for c in w) else ""


def _e(value: object) -> str:
    return escape(str(value), quote=True)


def _csp() -> str:
    digest = base64.b64encode(hashlib.sha256(_SCRIPT.encode("utf-8")).digest()).decode()
    return (f"default-src 'none'; style-src 'unsafe-inline'; img-src data:; "
            f"script-src 'sha256-{digest}'; base-uri 'none'; form-action 'none'")


def _table(head: Sequence[str], rows: Iterable[Sequence[object]], numeric_from: int = 1,
           cls: str = "") -> str:
    rows = list(rows)
    if not rows:
        return '<p class="sub-title">(none)</p>'
    th = "".join(f'<th class="num">{_e(h)}</th>' if i >= numeric_from else f"<th>{_e(h)}</th>"
                 for i, h in enumerate(head))
    body = []
    for row in rows:
        cells = "".join(f'<td class="num">{_e(v)}</td>' if i >= numeric_from else
                        f"<td>{_e(v)}</td>" for i, v in enumerate(row))
        body.append(f"<tr>{cells}</tr>")
    klass = f' class="{cls}"' if cls else ""
    return f"<table{klass}><thead><tr>{th}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _headline(report: Report) -> str:
    rows = []
    for label, shown, key, value in t.headline(report):
        tone = ""
        if key == "difference.absolute" and value != 0:
            tone = " better" if value < 0 else " worse"
        data = escape(json.dumps(value, allow_nan=False), quote=True)
        rows.append(f'<tr><th>{_e(label)}</th><td class="num{tone}" data-key="{_e(key)}" '
                    f'data-value="{data}">{_e(shown)}</td></tr>')
    return f'<table class="headline"><tbody>{"".join(rows)}</tbody></table>'


def _gate(report: Report) -> str:
    if report.gate is None:
        return ""
    if report.gate["passed"]:
        return '<div class="gate pass" id="gate">Release gate passed</div>'
    reasons = "; ".join(report.gate["reasons"])
    return f'<div class="gate fail" id="gate">Release gate failed: {_e(reasons)}</div>'


def _confusions(rows: Sequence[Confusion]) -> str:
    """One table of the most frequent errors of either system; a click on a heading sorts
    it by that column (the page's script; numbers by value, words by text)."""
    if not rows:
        return '<p class="sub-title">(none)</p>'
    head = ["kind", "reference", "hypothesis", "before", "after", "change"]
    th = "".join(f'<th class="{"num " if i >= 3 else ""}sort" tabindex="0" '
                 f'aria-sort="none">{_e(h)}</th>' for i, h in enumerate(head))
    body = []
    for c in rows:
        tone = " better" if c.change < 0 else " worse" if c.change > 0 else ""
        words = "".join(f'<td dir="auto">{_e(w) if w else "&ndash;"}</td>'
                        for w in (c.reference, c.hypothesis))
        body.append(f'<tr><td>{_e(c.kind)}</td>{words}<td class="num">{c.before}</td>'
                    f'<td class="num">{c.after}</td>'
                    f'<td class="num{tone}" data-value="{c.change}">{c.change:+d}</td></tr>')
    return (f'<table class="sortable" id="confusions"><thead><tr>{th}</tr></thead>'
            f'<tbody>{"".join(body)}</tbody></table>')


def _counts(report: Report) -> str:
    """The counts table, each system's errors drawn as a bar split by kind."""
    rows = t.counts_rows(report)
    most = max(report.before.errors, report.after.errors, 1)
    th = "".join(f'<th class="num">{_e(h)}</th>' if i else f"<th>{_e(h)}</th>"
                 for i, h in enumerate([*t.counts_head(report), "errors by kind"]))
    body = []
    for row, w in zip(rows, (report.before, report.after), strict=True):
        cells = "".join(f'<td class="num">{_e(v)}</td>' if i else f"<td>{_e(v)}</td>"
                        for i, v in enumerate(row))
        parts = "".join(
            f'<span class="{cls}" style="width:{100 * n / most:.2f}%" '
            f'title="{_e(label)} {n}"></span>'
            for cls, label, n in (("k-sub", "substitutions", w.substitutions),
                                  ("k-del", "deletions", w.deletions),
                                  ("k-ins", "insertions", w.insertions)) if n)
        body.append(f'<tr>{cells}<td><div class="kinds" role="img" aria-label="'
                    f'{w.substitutions} substitutions, {w.deletions} deletions, '
                    f'{w.insertions} insertions">{parts}</div></td></tr>')
    legend = ('<p class="legend"><span class="k-sub key"></span>substitutions '
              '<span class="k-del key"></span>deletions '
              '<span class="k-ins key"></span>insertions</p>')
    return (f'<table id="counts"><thead><tr>{th}</tr></thead><tbody>{"".join(body)}</tbody>'
            f"</table>{legend}")


def _rule_matches(rows: Sequence[Confusion]) -> str:
    """What the scoring rules counted as correct, counted in both systems ("" without)."""
    if not rows:
        return ""
    return ('<div class="card" id="rule-matches"><h3>Counted as correct by the scoring '
            'rules</h3>' + _table(["kind", "reference", "hypothesis", "before", "after"],
                                  [(c.kind, c.reference, c.hypothesis or "(left out)",
                                    c.before, c.after) for c in rows], 3) + "</div>")


def marked_words(alignment: Alignment, sep: str = " ") -> str:
    """The hypothesis with its differences from the reference marked word by word
    (``sep`` between them: nothing between characters under ``--unit char``)."""
    parts = []
    for op in alignment.ops:
        if op.kind == "equal":
            parts.append(_e(op.hyp))
        elif op.kind == "substitute":
            parts.append(f'<span class="w-sub" title="reference: {_e(op.ref)}">{_e(op.hyp)}'
                         "</span>")
        elif op.kind == "insert":
            parts.append(f'<ins title="inserted">{_e(op.hyp)}</ins>')
        elif op.kind == "equivalent":
            # correct under the scoring rules: the hypothesis's spelling, the reference's
            # on hover, and a dotted underline so it is seen not to be the same words
            parts.append(f'<span class="w-eqv" title="equivalent under the scoring rules to '
                         f'the reference: {_e(op.ref)}">{_e(str(op.hyp).replace(" ", sep))}'
                         "</span>")
        elif op.kind == "optional":
            parts.append(f'<span class="w-opt" title="optional word left out (no error)">'
                         f'({_e(str(op.ref).replace(" ", sep))})</span>')
        else:
            parts.append(f'<del title="deleted">{_e(op.ref)}</del>')
    return sep.join(parts) if parts else '<span class="sub-title">(no words)</span>'


def _utterance(index: int, u: UtteranceRow, sep: str = " ") -> str:
    tone = " better" if u.change < 0 else (" worse" if u.change > 0 else "")
    meta = ", ".join(f"{k}={v}" for k, v in sorted(u.meta.items(), key=lambda kv: kv[0]))
    ref = sep.join(_e(w) for w in u.before.reference) or '<span class="sub-title">(empty)</span>'
    words = [*u.before.reference, *u.before.hypothesis, *u.after.hypothesis]
    direction = _dir(words)
    return (
        f'<li class="utt" id="u{index}" data-change="{u.change}">'
        f'<span class="change{tone}">errors {u.before_errors} &rarr; {u.after_errors}</span>'
        f'<span class="uid">{_e(u.id)}</span>'
        + (f' <span class="sub-title">{_e(meta)}</span>' if meta else "")
        + '<table class="words"><tbody>'
        f"<tr><td>reference</td><td{direction}>{ref}</td></tr>"
        f"<tr><td>before</td><td{direction}>{marked_words(u.before, sep)}</td></tr>"
        f"<tr><td>after</td><td{direction}>{marked_words(u.after, sep)}</td></tr>"
        "</tbody></table></li>"
    )


def _tuning(report: Report) -> str:
    tuning = report.tuning
    if tuning is None or (tuning.surface is None and not tuning.depth):
        return ""
    cards = []
    if tuning.surface is not None:
        cards.append('<div class="card"><h3>Error surface on the tuning set</h3><figure>'
                     + plots.surface_heatmap(tuning.surface, tuning) + "</figure></div>")
    if tuning.depth:
        cards.append('<div class="card"><h3>' + t.say(report, "WER by N-best depth (dev set)")
                     + "</h3><figure>" + plots.depth_curve(tuning, t.say(report, "WER"))
                     + "</figure>"
                     + _table(["k", "1-best", "rescored", "oracle"],
                              [(r.depth, t.pct(r.one_best_wer), t.pct(r.tuned_wer),
                                t.pct(r.oracle_wer)) for r in tuning.depth]) + "</div>")
    return f'<h2>Tuning (dev set)</h2><div class="row">{"".join(cards)}</div>'


def _changed(report: Report) -> str:
    by_id = {u.id: u for u in report.utterances}
    cards = []
    for title, ids in (("Most improved", report.breakdown.improved),
                       ("Most worsened", report.breakdown.worsened)):
        cards.append(f'<div class="card"><h3>{title}</h3>'
                     + _table(["id", "before", "after"],
                              [(i, by_id[i].before_errors, by_id[i].after_errors) for i in ids])
                     + "</div>")
    return f'<div class="row">{"".join(cards)}</div>'


def _by_meta(report: Report) -> str:
    out = []
    for key, groups in report.breakdown.by_meta.items():
        head, rows = t.group_table(key, groups, report)
        out.append(f'<div class="card"><h3>{t.say(report, "WER")} by {_e(key)}</h3>'
                   + _table(head, rows) + "</div>")
    skipped = report.breakdown.meta_skipped
    if skipped:
        out.append('<div class="card" id="meta-skipped"><h3>Metadata keys not broken down</h3>'
                   + _table(["key", "why", "distinct values"],
                            [(k.key, k.reason, k.values) for k in skipped], numeric_from=2)
                   + "</div>")
    return f'<div class="row">{"".join(out)}</div>' if out else ""


def _critical(report: Report) -> str:
    if not report.critical:
        return ""
    head, rows = t.critical_table(report)
    worse = "".join(f"<li>worse on {_e(c.name)}: {_e(t.worse_text([w.id for w in c.worse]))}"
                    "</li>" for c in report.critical if c.worse)
    return ('<div class="card" id="critical-words"><h3>Critical words</h3>'
            + _table(head, rows) + f'<ul class="notes">{worse}<li>{_e(t.CRITICAL_NOTE)}</li>'
            "</ul></div>")


def _overlap(report: Report) -> str:
    if report.overlap is None:
        return ""
    head, rows = t.overlap_table(report)
    return ('<div class="card" id="overlap"><h3>Test references in the LM\'s training text</h3>'
            + _table(head, rows) + f'<ul class="notes"><li>{_e(t.OVERLAP_NOTE)}</li></ul></div>')


def _confidence(report: Report) -> str:
    """The word-confidence card (rescore.report.confidence), when the file carries them."""
    if report.confidence is None:
        return ""
    notes = "".join(f"<li>{_e(line)}</li>" for line in confidence_lines(report.confidence))
    return ('<div class="card" id="confidence"><h3>Word confidences</h3>'
            f'<ul class="notes">{notes}</ul>' + _table(*confidence_rows(report.confidence))
            + f'<div class="caution"><strong>Caution.</strong> {_e(CONFIDENCE_CAUTION)}</div>'
            '</div>')


def _warnings(report: Report) -> str:
    return "".join(f'<div class="warning"><strong>Warning.</strong> {_e(w)}</div>'
                   for w in report.warnings)


def render_html(report: Report) -> str:
    counts = _counts(report)
    confusions = _confusions(report.breakdown.confusions)
    ruled = any(op.kind in _RULED for u in report.utterances
                for al in (u.before, u.after) for op in al.ops)
    counted = t.counting_text(report)
    notes = "".join(f"<li>{_e(n)}</li>" for n in t.method_notes(report))
    utterances = "".join(_utterance(i, u, report.joiner)
                         for i, u in enumerate(report.utterances))
    provenance = _table(["item", "value"], t.provenance_rows(report), numeric_from=9)
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta http-equiv="Content-Security-Policy" content="{_e(_csp())}">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="referrer" content="no-referrer">
<title>{_e(t.title(report))}</title>
<style>{_CSS}{_RULES_CSS if ruled else ""}</style>
</head>
<body>
<header>
<h1>{_e(t.title(report))}</h1>
<p class="sub-title">{report.before.utterances} utterances, {report.before.reference_words}
{t.say(report, "reference words")}; normalisation {_e(report.provenance.get("normalisation", ""))}\
{"" if not counted else "; " + _e(counted)}</p>
</header>
<main>
{_warnings(report)}
{_gate(report)}
<div class="row">
<div class="card">{_headline(report)}</div>
<div class="card"><figure>{plots.wer_intervals(report, t.say(report, "WER"))}</figure></div>
</div>
<div class="caution" id="caution"><strong>Caution.</strong> {_e(t.CAUTION)}</div>
{_critical(report)}
{_overlap(report)}
{_confidence(report)}
<div class="card">{counts}</div>
<div class="card"><ul class="notes">{notes}</ul></div>
{_tuning(report)}
<h2>Breakdown</h2>
<div class="card"><h3>Confusions</h3><p class="sub-title">The most frequent errors of either
system, each counted in both (change: after minus before). Click a heading to sort.</p>
{confusions}</div>
{_rule_matches(report.breakdown.rule_matches)}{_changed(report)}
{_by_meta(report)}
<h2>Utterances</h2>
<div class="controls">
<input id="utt-filter" type="search" placeholder="filter by id or words" aria-label="filter">
<select id="utt-show" aria-label="show">
<option value="all">all</option><option value="changed">changed</option>
<option value="improved">improved</option><option value="worsened">worsened</option>
<option value="unchanged">unchanged</option>
</select>
<span id="utt-count" class="sub-title"></span>
</div>
<p class="legend sub-title"><span class="w-sub">substituted</span><ins>inserted</ins>
<del>deleted</del>{_RULES_LEGEND if ruled else ""} (hover a substitution for the reference word)</p>
<ol class="utts">{utterances}</ol>
</main>
<footer>
<h3>Provenance</h3>
{provenance}
</footer>
<script>{_SCRIPT}</script>
</body>
</html>
"""
