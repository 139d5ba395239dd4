"""The HTML page of the appendix, as a jinja2 template (rendered with autoescape on).

Kept in a module rather than a data file so that every install carries it. The page is
self-contained: inline CSS, figures as base64 PNG, no scripts, no network.
"""
from __future__ import annotations

HTML = r"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="robustmod {{ version }}">
<title>Sensitivity appendix: {{ model.formula }}</title>
<style>
  :root { --ink: #1d1d1d; --muted: #5b5b5b; --rule: #d6d6d6; --ok: #00603f; --warn: #8a3b00; --band: #f4f6f8; }
  html { font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: var(--ink); line-height: 1.45; }
  body { max-width: 70rem; margin: 0 auto; padding: 1.5rem 1.2rem 3rem; font-size: 15px; }
  h1 { font-size: 1.55rem; margin: 0 0 .3rem; }
  h2 { font-size: 1.2rem; margin: 2.2rem 0 .6rem; padding-bottom: .2rem; border-bottom: 2px solid var(--ink); }
  h3 { font-size: 1.02rem; margin: 1.4rem 0 .4rem; }
  p.sub { color: var(--muted); margin: 0 0 1rem; }
  code, .mono { font-family: "DejaVu Sans Mono", "Liberation Mono", monospace; font-size: .92em; word-break: break-word; }
  .verdict { border-left: 6px solid var(--warn); background: var(--band); padding: .8rem 1rem; margin: 1rem 0; }
  .verdict.survives { border-left-color: var(--ok); }
  .verdict .head { font-weight: bold; font-size: 1.08rem; margin-bottom: .3rem; }
  table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .9rem; display: block; overflow-x: auto; max-width: 100%; }
  dd { overflow-wrap: anywhere; }
  th, td { padding: .28rem .6rem; text-align: left; vertical-align: top; }
  thead th { border-bottom: 1.5px solid var(--ink); border-top: 1.5px solid var(--ink); }
  tbody tr:last-child td { border-bottom: 1.5px solid var(--ink); }
  table[data-table] code { white-space: nowrap; }
  td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
  tr.primary td { background: var(--band); font-weight: bold; }
  tr.unusable td { color: var(--muted); }
  .note { color: var(--muted); font-size: .86rem; }
  dl.kv { display: grid; grid-template-columns: max-content 1fr; gap: .2rem 1rem; margin: .4rem 0 1rem; }
  dl.kv dt { color: var(--muted); }
  dl.kv dd { margin: 0; }
  figure { margin: 1.2rem 0; }
  figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
  figcaption { font-size: .88rem; color: var(--muted); margin-top: .3rem; }
  .skipped { color: var(--muted); font-style: italic; }
  ul.cautions li { margin-bottom: .35rem; }
  nav ol { columns: 2; font-size: .9rem; }
  @media print {
    body { max-width: none; font-size: 10.5pt; padding: 0; }
    nav { display: none; }
    h2 { break-after: avoid; }
    table, figure, .verdict { break-inside: avoid; }
    table { display: table; overflow: visible; }
    a { color: inherit; text-decoration: none; }
  }
</style>
</head>
<body>
<header>
<h1>Sensitivity appendix</h1>
<p class="sub">Is the moderation of <code>{{ model.focal }}</code> by {% for m in model.moderators %}<code>{{ m }}</code>{% if not loop.last %} and {% endif %}{% endfor %} an artifact of how the residual variance is treated? Model <code>{{ model.formula }}</code>, {{ model.n_obs }} rows, {{ level_pct }} level.</p>
{% if data_note %}<p class="note" id="data-note">{{ data_note }}</p>{% endif %}
</header>

<div class="verdict{% if summary.survives %} survives{% endif %}" id="verdict" data-survives="{{ 'true' if summary.survives else 'false' }}">
  <div class="head">{% if summary.survives %}The finding survives every variance treatment checked.{% elif summary.primary_supported %}The finding is sensitive to the variance treatment.{% else %}The primary analysis does not support the product term.{% endif %}</div>
  <div id="summary-sentence">{{ summary.sentence }}</div>
</div>

<nav><ol>
  <li><a href="#model">Model</a></li><li><a href="#data">Data</a></li>
  <li><a href="#comparison">Comparison of back-ends</a></li><li><a href="#robustness">Robustness summary</a></li>
  <li><a href="#diagnostics">Variance diagnostics</a></li><li><a href="#calibration">Calibration</a></li>
  <li><a href="#backends">Checks of each back-end</a></li><li><a href="#figures">Figures</a></li>
  {% if grid %}<li><a href="#grid">Specification grid</a></li>{% endif %}<li><a href="#cautions">Cautions</a></li><li><a href="#provenance">Provenance</a></li>
</ol></nav>

<section id="model">
<h2>1. Model</h2>
<dl class="kv">
  <dt>Formula</dt><dd><code>{{ model.formula }}</code></dd>
  <dt>Focal predictor</dt><dd><code>{{ model.focal }}</code></dd>
  <dt>Moderator(s)</dt><dd>{% for m in model.moderators %}<code>{{ m }}</code>{% if not loop.last %}, {% endif %}{% endfor %}</dd>
  <dt>Product term(s)</dt><dd>{% for t in model.interaction_terms %}<code>{{ t }}</code>{% if not loop.last %}, {% endif %}{% endfor %}</dd>
  <dt>Primary back-end</dt><dd><code>{{ summary.primary }}</code> (chosen before looking at the results)</dd>
  <dt>Level</dt><dd>alpha = {{ model.alpha }}, intervals at {{ level_pct }}</dd>
  <dt>Coefficient scale</dt><dd>{{ model.scale }}</dd>
  <dt>Effect scale</dt><dd>{{ model.effects_scale }}</dd>
  <dt>Probe values</dt><dd>{% for pt in probe_points %}{{ pt }}{% if not loop.last %}; {% endif %}{% endfor %}</dd>
  <dt>Seed</dt><dd>{{ model.seed }}</dd>
</dl>
</section>

<section id="data">
<h2>2. Data</h2>
<dl class="kv">
  <dt>Source</dt><dd>{% if data_note %}{{ data_note }} {% endif %}{% if data_name %}<code>{{ data_name }}</code>{% elif not data_note %}a data frame passed from Python{% endif %}{% if data_sha %} (SHA-256 <span class="mono">{{ data_sha }}</span>){% endif %}</dd>
  <dt>Rows</dt><dd>{{ model.n_input }} read, {{ model.n_obs }} used, {{ model.n_dropped }} dropped for missing values (listwise)</dd>
</dl>
<table id="moderator-summary">
<thead><tr><th>moderator</th><th>type</th><th>mean</th><th>SD</th><th>min</th><th>max</th><th>levels</th></tr></thead>
<tbody>
{% for m in moderator_rows %}<tr><td><code>{{ m.name }}</code></td><td>{{ m.type }}</td><td class="num">{{ m.mean }}</td><td class="num">{{ m.sd }}</td><td class="num">{{ m.min }}</td><td class="num">{{ m.max }}</td><td>{{ m.levels }}</td></tr>
{% endfor %}</tbody></table>
{% if warnings %}<h3>Warnings about the data and model</h3><ul>{% for w in warnings %}<li>{{ w }}</li>{% endfor %}</ul>{% endif %}
</section>

<section id="comparison">
<h2>3. Comparison of back-ends</h2>
<p>The product term {% for t in model.interaction_terms %}<code>{{ t }}</code>{% if not loop.last %} + {% endif %}{% endfor %} as each back-end estimates it, the slope of <code>{{ model.focal }}</code> at chosen moderator values and the region where that slope is significant. Intervals at {{ level_pct }}; coefficients on the {{ model.scale }}; moderator values and region boundaries on the raw scale. The primary back-end's row is shaded.</p>
{{ sections.comparison }}
{% if backend_warnings %}<h3>Back-end warnings</h3><ul>{% for bid, w in backend_warnings %}<li><code>{{ bid }}</code>: {{ w }}</li>{% endfor %}</ul>{% endif %}
</section>

<section id="robustness">
<h2>4. Robustness summary</h2>
<p>{{ summary.sentence }}</p>
<dl class="kv">
  <dt>Supported by</dt><dd>{{ summary.supported_by | join(", ") or "none" }}</dd>
  <dt>Not supported by</dt><dd>{{ summary.not_supported_by | join(", ") or "none" }}</dd>
  <dt>Not counted</dt><dd>{{ summary.unreliable | join(", ") or "none" }} <span class="note">(unavailable, or failed their own diagnostics)</span></dd>
  <dt>Same sign everywhere</dt><dd>{{ "yes" if summary.sign_consistent else "no" }}</dd>
  <dt>Survives</dt><dd id="survives">{{ "yes" if summary.survives else "no" }}</dd>
</dl>
{% if shifts %}<table id="shift-table">
<thead><tr><th>back-end vs primary ({{ summary.primary }})</th><th>relative change of estimate</th><th>relative change of interval width</th><th>largest boundary shift (raw scale)</th><th>as share of observed range</th></tr></thead>
<tbody>{% for s in shifts %}<tr><td><code>{{ s.id }}</code></td><td class="num">{{ s.est }}</td><td class="num">{{ s.width }}</td><td class="num">{{ s.shift }}</td><td class="num">{{ s.share }}</td></tr>{% endfor %}</tbody></table>{% endif %}
</section>

<section id="diagnostics">
<h2>5. Variance diagnostics</h2>
<p class="note">Tests on the OLS residuals. A small p says the residual spread is not constant, which is when the back-ends can disagree; a large p does not prove the spread constant.</p>
{{ sections.diagnostics }}
</section>

<section id="calibration">
<h2>6. Calibration</h2>
{% if groups.calibration %}{{ sections.calibration }}
{% else %}<p class="skipped">No calibration was run (add <code>--calibrate N</code>).</p>{% endif %}
</section>

<section id="backends">
<h2>7. Checks and models of each back-end</h2>
{% if groups.backends %}<p class="note">Each table comes from the back-end named in its title: its settings, its own checks and, where it models the variance, that model.</p>
{{ sections.backends }}
{% else %}<p class="skipped">No back-end contributed tables of its own.</p>{% endif %}
</section>

<section id="figures">
<h2>8. Figures</h2>
{% for f in figures %}{% if f.src %}<figure id="figure-{{ f.name }}"><img src="{{ f.src }}" alt="{{ f.title }}"><figcaption><b>{{ f.title }}.</b> {{ f.caption }}</figcaption></figure>
{% else %}<p class="skipped" id="figure-{{ f.name }}">{{ f.title }}: not drawn ({{ f.skipped }}).</p>
{% endif %}{% endfor %}
</section>

{% if grid %}<section id="grid">
<h2>9. Specification grid</h2>
{{ grid_section }}
</section>
{% endif %}
<section id="cautions">
<h2>{{ 10 if grid else 9 }}. Cautions</h2>
<ul class="cautions">{% for c in cautions %}<li>{{ c }}</li>{% endfor %}</ul>
</section>

<section id="provenance">
<h2>{{ 11 if grid else 10 }}. Provenance</h2>
<dl class="kv">
  <dt>Written</dt><dd>{{ provenance.created_utc }}</dd>
  <dt>Command</dt><dd><code>{{ provenance.command_line or "called from Python" }}</code></dd>
  <dt>Data file SHA-256</dt><dd class="mono">{{ provenance.data_sha256 or "not a file" }}</dd>
  <dt>Seed</dt><dd>{{ provenance.seed }}</dd>
  <dt>Python</dt><dd>{{ provenance.python }}</dd>
  {% for name, v in provenance.packages.items() %}<dt>{{ name }}</dt><dd>{{ v }}</dd>{% endfor %}
</dl>
<p class="note">The machine-readable results are in <code>results.json</code> (schema {{ schema }}); versions and the command in <code>provenance.json</code>.</p>
</section>
</body>
</html>
"""
