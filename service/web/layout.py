"""The desk's page frame: head, style sheet, the bar with the signed-in key, and small shared pieces.

Every text goes through ``service.report.markup`` (escaped by default). No script, no outside
resource: the style sheet is inline and the Content-Security-Policy allows nothing else.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from flask import url_for
from werkzeug.wrappers import Response

from service.report.charts import figure
from service.report.markup import Markup, element
from service.web.session import CSRF_FIELD, DeskSession

CONTENT_SECURITY_POLICY = ("default-src 'none'; style-src 'unsafe-inline'; img-src data:; base-uri 'none'; "
                           "form-action 'self'; frame-ancestors 'none'")

STYLE = Markup("""
:root { --ink: #1d2428; --muted: #56616a; --line: #d9dee2; --paper: #ffffff; --ground: #f2f4f3;
  --accent: #1d5b79; --good: #25643a; --bad: #a2261c; --unsure: #7a5300; }
* { box-sizing: border-box; }
body { font-family: system-ui, sans-serif; color: var(--ink); background: var(--ground); margin: 0;
  line-height: 1.5; font-size: 16px; }
header.bar { background: var(--paper); border-bottom: 1px solid var(--line); padding: 8px 16px;
  display: flex; flex-wrap: wrap; gap: 8px 20px; align-items: center; }
header.bar .name { font-weight: 700; letter-spacing: 0.04em; color: var(--accent); text-decoration: none; }
header.bar nav { display: flex; flex-wrap: wrap; gap: 4px 16px; flex: 1; }
header.bar .who { color: var(--muted); font-size: 0.9rem; }
main { max-width: 1240px; margin: 0 auto; padding: 16px; background: var(--paper); min-height: 100vh; }
h1 { font-size: 1.45rem; margin: 4px 0 8px; } h2 { font-size: 1.15rem; margin: 28px 0 8px;
  padding-bottom: 4px; border-bottom: 1px solid var(--line); }
a { color: var(--accent); } a:focus, button:focus, input:focus, select:focus { outline: 3px solid #f0b429;
  outline-offset: 1px; }
.lead { color: var(--muted); margin: 0 0 12px; }
.scroll { overflow-x: auto; }
table { border-collapse: collapse; width: 100%; font-size: 0.92rem; margin: 6px 0 12px; }
caption { text-align: left; color: var(--muted); font-size: 0.88rem; padding: 4px 0; }
th, td { text-align: left; padding: 6px 8px; border-bottom: 1px solid var(--line); vertical-align: top; }
th { background: #eef1f2; font-weight: 600; } td.num, th.num { text-align: right; }
td.num { font-variant-numeric: tabular-nums; }
tr.champion td { background: #f4f8ee; }
.tag { display: inline-block; padding: 0 6px; border-radius: 4px; font-size: 0.82rem; border: 1px solid; }
.tag.pass { color: var(--good); } .tag.fail { color: var(--bad); } .tag.inconclusive { color: var(--unsure); }
.tag.champion { color: var(--good); font-weight: 700; }
.note { color: var(--muted); font-size: 0.88rem; }
.problem { border-left: 6px solid var(--bad); background: #fbefee; padding: 8px 12px; margin: 12px 0; }
.done { border-left: 6px solid var(--good); background: #eef6f0; padding: 8px 12px; margin: 12px 0; }
dl.facts { display: grid; grid-template-columns: minmax(120px, 240px) 1fr; gap: 4px 12px; }
dl.facts dt { color: var(--muted); } dl.facts dd { margin: 0; overflow-wrap: anywhere; }
form.stack label { display: block; font-weight: 600; margin-top: 12px; }
form.stack .hint { display: block; font-weight: 400; color: var(--muted); font-size: 0.86rem; }
input[type=text], input[type=password], select { font: inherit; padding: 6px 8px; border: 1px solid #8a959d;
  border-radius: 4px; width: 100%; max-width: 420px; }
.field-error { color: var(--bad); font-size: 0.9rem; display: block; }
button { font: inherit; padding: 6px 14px; border-radius: 4px; border: 1px solid var(--accent);
  background: var(--accent); color: #fff; cursor: pointer; margin-top: 12px; }
button.quiet { background: var(--paper); color: var(--accent); margin-top: 0; }
.skip { position: absolute; left: -999px; } .skip:focus { left: 8px; top: 8px; background: var(--paper);
  padding: 6px 10px; z-index: 2; }
.pager { display: flex; gap: 16px; margin: 8px 0; }
code { font-size: 0.85rem; overflow-wrap: anywhere; }
@media (max-width: 600px) { main { padding: 10px; } dl.facts { grid-template-columns: 1fr; }
  dl.facts dd { margin-bottom: 6px; } th, td { padding: 4px 5px; } }
""")


def page(title: str, session: DeskSession | None, *content: object, status: int = 200) -> Response:
    """Answer with a whole desk page: the bar (with sign-out when signed in), the title and ``content``."""
    head = element("head", None, element("meta", {"charset": "utf-8"}),
                   element("meta", {"name": "viewport", "content": "width=device-width, initial-scale=1"}),
                   element("title", None, f"{title} \u00b7 sealfold desk"), element("style", None, STYLE))
    skip = element("a", {"class": "skip", "href": "#main"}, "Skip to the content")
    body = element("body", None, skip, _bar(session), element("main", {"id": "main"}, element("h1", None, title),
                                                       *content))
    return html_response("<!doctype html>\n" + element("html", {"lang": "en"}, head, body) + "\n", status)


def html_response(text: str, status: int = 200) -> Response:
    """An HTML answer with the desk's headers: strict CSP, no sniffing, never cached by a shared cache."""
    response = Response(text, status=status, mimetype="text/html")
    response.headers["Content-Security-Policy"] = CONTENT_SECURITY_POLICY
    response.headers["X-Content-Type-Options"] = "nosniff"
    response.headers["Cache-Control"] = "private, no-store"
    response.headers["Referrer-Policy"] = "same-origin"
    return response


def _bar(session: DeskSession | None) -> Markup:
    if session is None:
        return element("header", {"class": "bar"}, element("span", {"class": "name"}, "sealfold desk"))
    links = [element("a", {"href": url_for("desk.datasets")}, "Datasets")]
    if session.key.can("steward"):
        links.append(element("a", {"href": url_for("desk.audit_trail")}, "Audit trail"))
    if session.key.can("admin"):
        links.append(element("a", {"href": url_for("desk.key_list")}, "Keys"))
    sign_out = element("form", {"method": "post", "action": url_for("desk.sign_out")}, csrf_field(session),
                       element("button", {"type": "submit", "class": "quiet"}, "Sign out"))
    who = f"{session.key.name or session.key.id} \u00b7 {session.key.role} \u00b7 team {session.key.team}"
    return element("header", {"class": "bar"},
                   element("a", {"class": "name", "href": url_for("desk.datasets")}, "sealfold desk"),
                   element("nav", {"aria-label": "desk"}, links), element("span", {"class": "who"}, who), sign_out)


def csrf_field(session: DeskSession) -> Markup:
    """The hidden CSRF input every state-changing form of a signed-in page carries."""
    return element("input", {"type": "hidden", "name": CSRF_FIELD, "value": session.csrf})


def table(caption: str, headers: Sequence[str], rows: Iterable[Sequence[object]],
          row_classes: Sequence[str | None] | None = None) -> Markup:
    """A captioned table in a horizontally scrolling box (phones); cells that are numbers align right."""
    body = []
    rows_seen = [list(r) for r in rows]
    for i, row in enumerate(rows_seen):
        cells = [element("td", {"class": "num"}, figure(float(c))) if isinstance(c, float) else
                 element("td", {"class": "num"}, str(c)) if isinstance(c, int) and not isinstance(c, bool) else
                 element("td", None, c) for c in row]
        body.append(element("tr", {"class": row_classes[i] if row_classes else None}, cells))
    if not body:
        return element("p", {"class": "note"}, f"{caption}: none yet.")
    numeric = [all(isinstance(r[i], int | float) and not isinstance(r[i], bool) for r in rows_seen)
               for i in range(len(headers))]
    head = element("tr", None, [element("th", {"scope": "col", "class": "num" if n else None}, h)
                                for h, n in zip(headers, numeric, strict=True)])
    return element("div", {"class": "scroll"}, element("table", None, element("caption", None, caption),
                                                      element("thead", None, head), element("tbody", None, body)))


def facts(items: Sequence[tuple[str, object]]) -> Markup:
    """A definition list of label and value pairs."""
    return element("dl", {"class": "facts"}, [(element("dt", None, k), element("dd", None, v)) for k, v in items])


def decision_tag(decision: str | None) -> Markup:
    """A verdict as a word in a bordered tag (the word carries the meaning; colour only helps)."""
    if not decision:
        return element("span", {"class": "note"}, "no verdict yet")
    return element("span", {"class": f"tag {decision}"}, decision)


def when(stamp: str | None) -> str:
    """An ISO timestamp of the records as 'YYYY-MM-DD HH:MM UTC'."""
    if not stamp:
        return "-"
    return stamp[:16].replace("T", " ") + " UTC"
