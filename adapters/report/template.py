"""The shift report's HTML page: one Jinja2 template, styles inline, nothing fetched.

The page is self-contained: styles in a ``<style>`` element, plots as inline
SVG, the system font stack of the reader's machine, no scripts, no links to
anything outside the file. Jinja2 escapes every value (autoescape); only the
SVG text made by :mod:`.report_plots` is inserted as markup.
"""

from __future__ import annotations

PAGE = r"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{{ title }}</title>
<style>
  :root { --ink: #1f2a36; --muted: #5b6672; --line: #d8dde3; --soft: #f5f7f9; --warn: #b4451f; --ok: #3f6d2c; }
  * { box-sizing: border-box; }
  body { margin: 0; color: var(--ink); background: #fff;
         font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
  main { max-width: 1040px; margin: 0 auto; padding: 24px 20px 48px; }
  h1 { font-size: 1.55rem; margin: 0 0 4px; }
  h2 { font-size: 1.2rem; margin: 32px 0 10px; padding-bottom: 4px; border-bottom: 2px solid var(--line); }
  h3 { font-size: 1.05rem; margin: 0 0 6px; overflow-wrap: anywhere; }
  p { margin: 6px 0; }
  .sub { color: var(--muted); margin: 0; }
  .caution { border-left: 4px solid var(--warn); background: #fbf3ee; padding: 10px 14px; margin: 18px 0; }
  table { border-collapse: collapse; width: 100%; margin: 8px 0; }
  th, td { text-align: left; padding: 5px 8px; border-bottom: 1px solid var(--line); vertical-align: top;
           overflow-wrap: anywhere; }
  th { font-weight: 600; background: var(--soft); }
  td.num, th.num { text-align: right; white-space: nowrap; }
  td.flag { white-space: nowrap; }
  .above { color: var(--warn); font-weight: 600; }
  .within { color: var(--ok); }
  .grid { display: grid; grid-template-columns: repeat(auto-fit, minmax(300px, 1fr)); gap: 8px 24px; }
  .incident { border: 1px solid var(--line); border-radius: 6px; padding: 14px 16px; margin: 16px 0;
              break-inside: avoid; }
  .incident.alarm { border-left: 5px solid var(--warn); }
  .incident.warning { border-left: 5px solid #c99a2e; }
  .meta { color: var(--muted); font-size: 0.92rem; margin-bottom: 8px; }
  figure { margin: 6px 0; }
  svg { display: block; width: 100%; height: auto; max-width: 100%; }
  ul.lines { margin: 6px 0 0; padding-left: 20px; }
  ul.lines li { margin: 3px 0; }
  .none { color: var(--muted); }
  footer { margin-top: 40px; color: var(--muted); font-size: 0.88rem; }
  @media print { .incident { page-break-inside: avoid; } }
</style>
</head>
<body>
<main>
<header>
  <h1>{{ title }}</h1>
  <p class="sub">{{ subtitle }}</p>
  <p class="sub">Store {{ store_url }} &middot; times in {{ zone_name }} &middot; made {{ generated }}</p>
</header>

<p class="caution"><strong>Caution.</strong> {{ caution }}</p>

<section id="figures">
<h2>{{ figures_heading }}</h2>
<p>{{ headline }}</p>
<table class="reference">
  <thead><tr><th>Figure</th><th class="num">{{ value_heading }}</th><th>Reference (common practice)</th><th></th></tr></thead>
  <tbody>
  {% for row in reference %}
    <tr><td>{{ row.figure }}</td><td class="num">{{ row.value }}</td><td>{{ row.reference }}</td>
      <td class="flag">{% if row.within is none %}{% elif row.within %}<span class="within">within</span>{% else %}<span class="above">above</span>{% endif %}</td></tr>
  {% endfor %}
  </tbody>
</table>
<p class="sub">Reference rates as ISA-18.2 and EEMUA 191 present them for one operator (common practice; the
numbers are quoted from memory). An alarm here is one event of either severity that started in the window.</p>

<figure id="rate">{{ rate_svg }}</figure>

{% if floods %}
<h3>Floods</h3>
<ul class="lines">{% for f in floods %}<li>{{ f }}</li>{% endfor %}</ul>
{% endif %}

<h3>Feeds with most alarms</h3>
{% if top_feeds %}
<table><thead><tr><th>Feed</th><th class="num">Alarms</th><th class="num">Share of all alarms</th></tr></thead><tbody>
{% for f in top_feeds %}<tr><td>{{ f.feed_id }}</td><td class="num">{{ f.alarms }}</td><td class="num">{{ f.share }}</td></tr>{% endfor %}
</tbody></table>
{% else %}<p class="none">No alarms.</p>{% endif %}

<div class="grid">
{% for block in lists %}
<div>
<h3>{{ block.title }}</h3>
{% if block.lines %}<ul class="lines">{% for line in block.lines %}<li>{{ line }}</li>{% endfor %}</ul>
{% else %}<p class="none">None.</p>{% endif %}
</div>
{% endfor %}
</div>
</section>

<section id="incidents">
<h2>Incidents ({{ incidents|length }}{% if more_incidents %} of {{ incidents|length + more_incidents|length }}{% endif %})</h2>
{% if not incidents %}<p class="none">No incidents in this window.</p>{% endif %}
{% for inc in incidents %}
<article class="incident {{ inc.severity }}" id="incident-{{ loop.index }}">
  <h3>{{ loop.index }}. {{ inc.feed_id }}: {{ inc.rules }}</h3>
  <p class="meta">{{ inc.when }}</p>
  {% if inc.svg %}<figure>{{ inc.svg }}</figure>{% else %}<p class="none">{{ inc.no_plot }}</p>{% endif %}
  <ul class="lines">
  {% for line in inc.lines %}<li>{{ line }}</li>{% endfor %}
  </ul>
</article>
{% endfor %}
{% if more_incidents %}
<h3>Further incidents, without panels</h3>
<ul class="lines">{% for line in more_incidents %}<li>{{ line }}</li>{% endfor %}</ul>
{% endif %}
</section>
{% if tune %}

<section id="tune">
<h2>Settings tried (leadline tune)</h2>
<p class="meta">From {{ tune.source }}: the same history replayed once per setting.</p>
{% if tune.svg %}<figure>{{ tune.svg }}</figure>{% endif %}
<table><tr><th>#</th><th>setting</th><th>alarms per feed-week</th><th>alarms per shift</th><th>recall</th><th>precision</th></tr>
{% for r in tune.rows %}<tr><td class="num">{{ r.n }}</td><td>{{ r.setting }}</td><td class="num">{{ r.per_week }}</td><td class="num">{{ r.per_shift }}</td><td class="num">{{ r.recall }}</td><td class="num">{{ r.precision }}</td></tr>
{% endfor %}</table>
</section>
{% endif %}

<footer>
  <p>Made by leadline {{ version }} from the event store. Figures: alarms started in the window; a flood is more
  than {{ flood_alarms }} alarms starting within 10 minutes; a repeating alarm is {{ repeat_min }} or more episodes
  of one rule on one feed; a standing alarm was active at the end of the window and had started at least 24 h
  before it. Plots show the readings, the model's one-step forecast and its forecast interval, the alarm's span
  shaded and its onset marked.</p>
</footer>
</main>
</body>
</html>
"""
