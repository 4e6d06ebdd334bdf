# ruff: noqa: E501
"""The report's page: one jinja2 template, its style sheet and its one small script.

Kept apart from :mod:`workbench.report.render` so the logic there stays short. Every value reaches
the page through jinja2 with autoescaping on; nothing user-supplied is ever marked safe.
The script only sorts and filters the estimates table with ``textContent`` (never
``innerHTML``) and carries no data; the page's Content-Security-Policy admits it by its
hash and nothing else (no other script, no network, images only as ``data:`` URLs).
"""

from __future__ import annotations

STYLE = """
:root { --ink:#1d2833; --soft:#4a5762; --line:#d5dde3; --wash:#f3f6f8; --blue:#1f6aa5;
  --ochre:#b36b00; --red:#b3261e; --redwash:#fdecea; --okwash:#eaf2f9; }
* { box-sizing: border-box; }
html { font-size: 15px; }
body { margin: 0; color: var(--ink); background: #fff; line-height: 1.45;
  font-family: system-ui, -apple-system, "Segoe UI", "Liberation Sans", "DejaVu Sans", sans-serif; }
header.top { background: var(--ink); color: #fff; padding: 18px 28px 14px; }
header.top h1 { margin: 0 0 4px; font-size: 1.45rem; font-weight: 650; letter-spacing: .01em; }
header.top p { margin: 0; color: #c9d3db; font-size: .9rem; }
nav.toc { background: var(--wash); border-bottom: 1px solid var(--line); padding: 8px 28px;
  font-size: .86rem; position: sticky; top: 0; z-index: 2; }
nav.toc a { color: var(--ink); margin-right: 14px; text-decoration: none; white-space: nowrap; }
nav.toc a:hover { text-decoration: underline; }
main { max-width: 1120px; margin: 0 auto; padding: 8px 28px 40px; }
section { border-top: 1px solid var(--line); padding: 10px 0 18px; scroll-margin-top: 40px; }
h2 { font-size: 1.2rem; margin: 14px 0 8px; }
h2 .no { color: var(--soft); font-weight: 500; margin-right: 6px; }
h3 { font-size: 1rem; margin: 16px 0 6px; }
p, li { max-width: 78ch; }
.muted { color: var(--soft); }
.small { font-size: .86rem; }
code, .mono { font-family: ui-monospace, "DejaVu Sans Mono", "Liberation Mono", monospace;
  font-size: .86rem; }
pre.cmd { background: var(--wash); border: 1px solid var(--line); padding: 10px 12px;
  overflow-x: auto; white-space: pre-wrap; word-break: break-all; }
.verdict { border: 2px solid var(--blue); background: var(--okwash); border-radius: 6px;
  padding: 12px 16px; margin: 14px 0; }
.verdict .word { font-size: 1.35rem; font-weight: 750; letter-spacing: .03em; }
.verdict.ready .word { color: var(--blue); }
.verdict.not-ready { border-color: var(--red); background: var(--redwash); }
.verdict.not-ready .word, .red { color: var(--red); }
.verdict p { margin: 4px 0; }
.caution-box { border-left: 4px solid var(--ochre); background: #fdf5e8; padding: 8px 14px;
  margin: 12px 0; font-size: .92rem; }
.absent { color: var(--soft); font-style: italic; }
table { border-collapse: collapse; font-size: .86rem; margin: 6px 0 10px; }
th, td { border-bottom: 1px solid var(--line); padding: 3px 9px; vertical-align: top; }
th { text-align: left; background: var(--wash); font-weight: 600; }
table.kv th { background: none; font-weight: 600; width: 16em; }
table.data td { text-align: right; font-variant-numeric: tabular-nums; }
table.data td.t, table.data th.t { text-align: left; }
table.data td.t:first-child, table.data td.flag { white-space: nowrap; }
table.data th { text-align: right; position: sticky; top: 0; }
table.data th.t { text-align: left; }
.scroll { max-height: 640px; overflow: auto; border: 1px solid var(--line);
  display: inline-block; max-width: 100%; }
.scroll table { margin: 0; }
tr.flag-above td.flag { color: var(--blue); font-weight: 600; }
tr.flag-below td.flag { color: var(--ochre); font-weight: 600; }
tr.flag-better td.flag { color: var(--blue); font-weight: 600; }
tr.flag-worse td.flag { color: var(--ochre); font-weight: 600; }
tr.gap td { text-align: center; font-style: italic; color: var(--soft); background: var(--wash); }
button.sort { font: inherit; font-weight: 600; background: none; border: 0; padding: 0;
  cursor: pointer; color: inherit; text-align: inherit; }
th[aria-sort="ascending"] button.sort::after { content: " \\25B2"; font-size: .7em; }
th[aria-sort="descending"] button.sort::after { content: " \\25BC"; font-size: .7em; }
.controls { margin: 6px 0; font-size: .9rem; }
.controls input { font: inherit; padding: 3px 6px; width: 18em; }
figure { margin: 10px 0 16px; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--line); }
figcaption { font-size: .86rem; color: var(--soft); max-width: 78ch; }
.grid2 { display: grid; grid-template-columns: repeat(auto-fit, minmax(420px, 1fr)); gap: 12px; }
.badge { display: inline-block; padding: 0 7px; border-radius: 9px; font-size: .8rem;
  font-weight: 650; border: 1px solid currentColor; }
.badge.good { color: var(--blue); }
.badge.bad { color: var(--red); }
footer { color: var(--soft); font-size: .8rem; border-top: 1px solid var(--line);
  padding: 12px 28px 24px; max-width: 1120px; margin: 0 auto; }
@media print { nav.toc { position: static; } .scroll { max-height: none; overflow: visible; } }
"""

SCRIPT = """
(function () {
  "use strict";
  var table = document.getElementById("estimates-table");
  if (!table) { return; }
  var body = table.tBodies[0];
  var rows = Array.prototype.slice.call(body.rows).filter(function (r) {
    return !r.classList.contains("gap");
  });
  var gaps = Array.prototype.slice.call(body.querySelectorAll("tr.gap"));
  var controls = document.getElementById("estimates-controls");
  var input = document.getElementById("estimates-filter");
  var count = document.getElementById("estimates-count");
  controls.hidden = false;
  function update() {
    var q = input.value.trim().toLowerCase();
    var shown = 0;
    rows.forEach(function (r) {
      var hit = q === "" || r.textContent.toLowerCase().indexOf(q) !== -1;
      r.hidden = !hit;
      if (hit) { shown += 1; }
    });
    gaps.forEach(function (g) { g.hidden = q !== ""; });
    count.textContent = shown + " of " + rows.length + " rows shown";
  }
  input.addEventListener("input", update);
  var heads = table.tHead.rows[0].cells;
  Array.prototype.forEach.call(heads, function (th, col) {
    var button = document.createElement("button");
    button.type = "button";
    button.className = "sort";
    button.title = "sort by this column";
    while (th.firstChild) { button.appendChild(th.firstChild); }
    th.appendChild(button);
    button.addEventListener("click", function () {
      var dir = th.getAttribute("aria-sort") === "ascending" ? -1 : 1;
      Array.prototype.forEach.call(heads, function (h) { h.removeAttribute("aria-sort"); });
      th.setAttribute("aria-sort", dir === 1 ? "ascending" : "descending");
      var numeric = th.getAttribute("data-type") === "num";
      rows.sort(function (a, b) {
        var x = a.cells[col].textContent, y = b.cells[col].textContent;
        if (numeric) {
          x = parseFloat(x); y = parseFloat(y);
          if (isNaN(x) && isNaN(y)) { return 0; }
          if (isNaN(x)) { return 1; }
          if (isNaN(y)) { return -1; }
          return (x - y) * dir;
        }
        return x.localeCompare(y) * dir;
      });
      gaps.forEach(function (g) { g.hidden = true; });
      rows.forEach(function (r) { body.appendChild(r); });
    });
  });
  update();
}());
"""

TEMPLATE = """<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta http-equiv="Content-Security-Policy" content="{{ csp }}">
<meta name="generator" content="workbench {{ version }}">
<link rel="icon" href="data:,">
<title>workbench report: {{ title }}</title>
<style>{{ style }}</style>
</head>
<body>
{% macro absent(what, why="not computed for this run") -%}
<p class="absent">{{ what }}: {{ why }}.</p>
{%- endmacro %}
{% macro figure(name, caption) -%}
{% if name in images %}
<figure id="figure-{{ name }}">
<img src="{{ images[name].uri }}" width="{{ images[name].width }}" height="{{ images[name].height }}"
 alt="{{ images[name].alt }}">
<figcaption>{{ caption }} <span class="mono">({{ figures_dir }}/{{ images[name].file_name }})</span></figcaption>
</figure>
{% endif %}
{%- endmacro %}
{% macro kv(rows) -%}
<table class="kv">
{% for key, value in rows %}<tr><th scope="row">{{ key }}</th><td>{{ value }}</td></tr>
{% endfor %}</table>
{%- endmacro %}
{% macro data_table(table, id=None) -%}
<table class="data"{% if id %} id="{{ id }}"{% endif %}>
<thead><tr>{% for col in table.columns %}<th scope="col" class="{{ col.kind }}"
 data-type="{{ col.kind }}">{{ col.label }}</th>{% endfor %}</tr></thead>
<tbody>
{% for row in table.rows %}{% if row.gap %}<tr class="gap"><td colspan="{{ table.columns|length }}">{{ row.gap }}</td></tr>
{% else %}<tr{% if row.cls %} class="{{ row.cls }}"{% endif %}>{% for cell in row.cells %}<td{% if cell.cls %} class="{{ cell.cls }}"{% endif %}>{{ cell.text }}</td>{% endfor %}</tr>
{% endif %}{% endfor %}</tbody>
</table>
{%- endmacro %}

<header class="top">
<h1>workbench report: {{ title }}</h1>
<p>{{ subtitle }}</p>
</header>
<nav class="toc" aria-label="sections">
{% for anchor, name in sections %}<a href="#{{ anchor }}">{{ name }}</a>{% endfor %}
</nav>
<main>

<div id="verdict" class="verdict {{ verdict.cls }}" role="status">
<p class="word">{{ verdict.headline }}</p>
<p>{{ verdict.meaning }}</p>
{% if checks_line %}<p>{{ checks_line }}</p>{% endif %}
</div>
<div class="caution-box"><strong>Read with care.</strong> {{ caution_short }}
<a href="#cautions">All cautions</a>.</div>

<section id="data">
<h2><span class="no">1</span>Data and row reconciliation</h2>
{{ kv(data_rows) }}
{% if notes %}<h3>Notes from reading the data</h3>
<ul>{% for n in notes %}<li>{{ n }}</li>{% endfor %}</ul>{% endif %}
</section>

<section id="model">
<h2><span class="no">2</span>Model, priors and engine</h2>
{{ kv(model_rows) }}
<h3>Population</h3>
{% if population %}{{ data_table(population) }}{% else %}{{ absent("Population parameters", "not in this model") }}{% endif %}
{{ figure("population", "Posterior draws of the population parameters; the orange band is the interval from " ~ population_file ~ ".") }}
{% if parents %}<h3>Parents</h3>
<p class="small">Each parent's effect on the log-odds (0 is the population: a positive effect lifts the rates of its groups) and the rate of its typical group, from {{ parents_file }}.</p>
{{ figure("parents", "Parent effects with their intervals, largest first; the typical group's rate at the right.") }}
<div class="scroll">{{ data_table(parents) }}</div>{% endif %}
<h3>Chain mixing</h3>
{% if "mixing" in images %}
{{ figure("mixing", "Traces of the population parameters by chain, and each chain's rank histogram; well-mixed chains overlap and give flat, alike histograms.") }}
{% else %}<p class="muted">{{ mixing_note }}</p>{% endif %}
</section>

<section id="verdict-detail">
<h2><span class="no">3</span>The verdict</h2>
<div class="verdict {{ verdict.cls }}">
<p class="word">{{ verdict.headline }}</p>
<p>{{ verdict.meaning }}</p>
</div>
{% if verdict.reasons %}<h3 class="red">Why it is not ready</h3>
<ul>{% for r in verdict.reasons %}<li class="red">{{ r }}</li>{% endfor %}</ul>{% endif %}
{% if verdict.remedies %}<h3>What to try, first things first</h3>
<ol>{% for r in verdict.remedies %}<li>{{ r }}</li>{% endfor %}</ol>{% endif %}
{{ kv(verdict.rows) }}
{% if verdict.notes %}<ul class="small muted">{% for n in verdict.notes %}<li>{{ n }}</li>{% endfor %}</ul>{% endif %}
{% if verdict.worst %}<h3>Quantities closest to their limits</h3>
{{ data_table(verdict.worst) }}{% endif %}
{% if verification %}<h3>Self-check</h3>{{ kv(verification) }}{% endif %}
</section>

<section id="checks">
<h2><span class="no">4</span>Checks and comparison</h2>
{% if checks %}
<p>Posterior predictive checks: <span class="badge {{ checks.badge }}">{{ checks.verdict }}</span>
<span class="muted small">{{ checks.reading }}</span></p>
{{ data_table(checks.table) }}
{{ figure("predictive", "Each test statistic on replicated data sets drawn from the fitted model, against its value on the observed data.") }}
<h3>Held-out groups (leave one group out)</h3>
{% if checks.loo %}{{ kv(checks.loo) }}{% else %}{{ absent("Leave-one-group-out", "not available for this run") }}{% endif %}
{{ figure("loo_pit", "LOO-PIT values of the held-out groups; calibrated predictions give a flat histogram.") }}
{% else %}{{ absent("Posterior predictive checks and leave-one-group-out") }}{% endif %}
<h3>Comparison across pooling choices</h3>
{% if comparison %}{{ data_table(comparison) }}
<ul class="small">{% for line in comparison_lines %}<li>{{ line }}</li>{% endfor %}</ul>
{% else %}{{ absent("Comparison", "not computed for this run (workbench compare writes it)") }}{% endif %}
</section>

<section id="estimates">
<h2><span class="no">5</span>Estimates</h2>
{% if not final %}<p class="red"><strong>Not final:</strong> the convergence verdict is not-ready; these numbers are provisional.</p>{% endif %}
<p class="small">{{ estimates_note }}</p>
{{ figure("intervals", "Each group's estimate (posterior mean, dot) and interval (bar), highest first; the red tick is the observed rate.") }}
{{ figure("shrinkage", "Partial pooling pulls small groups' estimates from their observed rates towards the population mean; large groups barely move.") }}
<h3>Table</h3>
<p id="estimates-controls" class="controls" hidden><label>Filter rows: <input id="estimates-filter" type="search" placeholder="group name or value" autocomplete="off"></label>
<span id="estimates-count" class="muted"></span> <span class="muted small">Click a column heading to sort.</span></p>
<div class="scroll">{{ data_table(estimates, "estimates-table") }}</div>
</section>

<section id="ranks">
<h2><span class="no">6</span>Ranks and targets</h2>
{% if ranks and ranks.none %}<p><strong>No ranking:</strong> {{ ranks.none }}.</p>
{% elif ranks %}
<p>{{ ranks.note }}</p>
{{ figure("ranks", ranks.caption) }}
<div class="grid2">
<div><h3>Best placed</h3>{{ data_table(ranks.best) }}</div>
<div><h3>Worst placed</h3>{{ data_table(ranks.worst) }}</div>
</div>
{% if ranks.pairwise %}<h3>Pairwise: probability that the row's group is better than the column's</h3>
<p class="small muted">{{ ranks.pairwise_note }}</p>
<div class="scroll">{{ data_table(ranks.pairwise) }}</div>{% endif %}
{% else %}{{ absent("Ranks") }}{% endif %}
<h3>Target</h3>
{% if targets %}{{ kv(targets) }}{% else %}{{ absent("Target flags", target_why) }}{% endif %}
<h3>Funnel plot</h3>
{% if "funnel" in images %}
{{ figure("funnel", funnel_caption) }}
{% if funnel_outside %}<p class="small">Groups outside the 99.8% limits:</p>
<div class="scroll">{{ data_table(funnel_outside) }}</div>{% endif %}
{% else %}{{ absent("Funnel plot") }}{% endif %}
</section>

<section id="predictions">
<h2><span class="no">7</span>Predictions and trials still needed</h2>
{% if new_group %}<p>A new, unseen group: {{ new_group }}</p>{% endif %}
{% if predictions %}<p class="small">{{ predictions_note }}</p><div class="scroll">{{ data_table(predictions) }}</div>
{% else %}{{ absent("Predictions of future trials", "not computed for this run (workbench predict writes them)") }}{% endif %}
<h3>Trials still needed</h3>
{% if needed %}{{ kv(needed.rows) }}
{% if needed.table %}<p class="small">{{ needed.note }}</p><div class="scroll">{{ data_table(needed.table) }}</div>{% endif %}
{% else %}{{ absent("Trials still needed", needed_why) }}{% endif %}
</section>

<section id="cautions">
<h2><span class="no">8</span>Cautions</h2>
<ul>{% for c in cautions %}<li>{{ c }}</li>{% endfor %}</ul>
</section>

<section id="reproduce">
<h2><span class="no">9</span>How to reproduce this run</h2>
<p>The commands that made it, in order:</p>
<ol id="commands">{% for step in reproduce.commands %}<li><span class="muted small">{{ step.what }}{% if step.at %}, {{ step.at }}{% endif %}:</span>
{% if step.command %}<pre class="cmd">{{ step.command }}</pre>{% else %}<p class="absent">run from Python: no command line recorded.</p>{% endif %}</li>
{% endfor %}</ol>
{% if reproduce.command %}<p>The same fit, with every setting that differs from its default (the seed is the one used):</p><pre class="cmd" id="fit-command">{{ reproduce.command }}</pre>{% endif %}
<p>Then <code>{{ reproduce.report_step }}</code> writes this page again from the run folder.</p>
<h3>Settings</h3>
{{ kv(reproduce.settings_rows) }}
<h3>Versions and input</h3>
{{ kv(reproduce.version_rows) }}
<h3>Files in the run folder</h3>
<p class="mono small">{% for f in reproduce.files %}{{ f }}{% if not loop.last %}, {% endif %}{% endfor %}</p>
</section>
</main>
<footer>Written by workbench {{ version }} on {{ created }} from the run folder
<span class="mono">{{ folder_name }}</span>. One self-contained file: it loads nothing from
the network. Figures are also saved as PNG files in <span class="mono">{{ figures_dir }}/</span>.</footer>
<script>{{ script }}</script>
</body>
</html>
"""
