"""The daily digest: one lab day of each apparatus, against its reference, where the lab looks.

Per apparatus: each headline figure of its reference series on the day against its
baseline (value with interval, state, size in unit and in standard errors;
:mod:`runlog.drift.standing`), the open alarms with their top suspects (notes first), the
day's notes, its monitors with their latest values at the end of the day and a warning for
each monitor that stopped reporting (:func:`runlog.monitors.overlay.monitor_list`), and
ingest health (files stored and refused that day, an apparatus that sent nothing). Rendered as plain text and as one self-contained HTML page whose charts are
inline SVG drawn here (no script, no external file), and sent by e-mail (SMTP from the
standard library; host and credentials from the environment, never printed) or to a chat
webhook (a JSON POST of the text; the URL, which often holds a token, is never printed).

Environment for e-mail: ``RUNLOG_SMTP_HOST``, ``RUNLOG_SMTP_PORT`` (default 587),
``RUNLOG_SMTP_USER``, ``RUNLOG_SMTP_PASSWORD`` (login only when both are set),
``RUNLOG_SMTP_STARTTLS`` ("0" to skip STARTTLS), ``RUNLOG_DIGEST_FROM``, ``RUNLOG_DIGEST_TO``
(comma-separated). For the webhook: ``RUNLOG_DIGEST_WEBHOOK``.
"""

from __future__ import annotations

import datetime as dt
import html
import json
import os
import smtplib
import urllib.request
from email.message import EmailMessage
from zoneinfo import ZoneInfo

from runlog.drift.standing import HEADLINE, standing
from runlog.errors import ConfigError, NotFoundError
from runlog.monitors.overlay import duration_words, stopped_words

__all__ = ["build_digest", "digest_text", "digest_html", "send_mail", "send_webhook", "due_day", "send_due"]

HISTORY_DAYS = 28


def build_digest(catalogue, *, day: dt.date | None = None, apparatus: str | None = None) -> dict[str, object]:
    """The digest of lab ``day`` (default: yesterday in the lab's time zone) as plain data."""
    zone = ZoneInfo(catalogue.lab_timezone)
    day = day or (dt.datetime.now(zone).date() - dt.timedelta(days=1))
    names = [apparatus] if apparatus else catalogue.apparatus_names()
    if apparatus and apparatus not in catalogue.apparatus_names():
        raise NotFoundError("apparatus", apparatus)
    open_alarms = catalogue.alarms()
    log = catalogue.ingest_log(limit=10_000)
    start = dt.datetime.combine(day, dt.time(), zone)
    end = start + dt.timedelta(days=1)
    entries = log[(log["finished_at"] >= start) & (log["finished_at"] < end)] if len(log) else log
    # Monitors as they stood at the end of the lab day (or now, for today): a digest made
    # again later says the same.
    as_of = min(end, dt.datetime.now(dt.timezone.utc))
    monitors = catalogue.monitors(now=as_of)
    out = {"day": day.isoformat(), "lab_timezone": str(zone), "monitors_as_of": as_of.astimezone(zone).isoformat(), "apparatus": [], "ingest": {
        "stored": int((entries["status"] == "ingested").sum()) if len(entries) else 0,
        "already_present": int((entries["status"] == "already-present").sum()) if len(entries) else 0,
        "refused": [{"file": os.path.basename(str(r.file)), "reason": r.reason} for r in entries.itertuples() if r.status == "refused"] if len(entries) else [],
    }}
    for name in names:
        stored = catalogue.figure_names(apparatus=name)
        figures = []
        for quantity in [q for q in HEADLINE if q in stored]:
            try:
                drift = catalogue.drift(quantity, apparatus=name, record_alarms=False)
            except NotFoundError:
                continue
            found = standing(drift, day, open_alarms)
            history = [(p.date.isoformat(), p.value, p.ci_low, p.ci_high, (drift.limits.get("lower") or [None] * len(drift.points))[i], (drift.limits.get("upper") or [None] * len(drift.points))[i], i in set(drift.out_of_limits)) for i, p in enumerate(drift.points) if day - dt.timedelta(days=HISTORY_DAYS) < p.date <= day]
            figures.append({**found, "history": history})
        days = catalogue.lab_days(apparatus=name)
        alarms = []
        for alarm in (a for a in open_alarms if a["apparatus"] == name):
            suspects = catalogue.suspects(alarm["quantity"], alarm["date"], apparatus=name, top=3)
            alarms.append({**alarm, "notes": suspects["notes"], "suspects": [c["words"] for c in suspects["causes"]], "verdict": suspects["verdict"]})
        notes = catalogue.annotations(apparatus=name, since=start)
        notes = [{"at": r.at.astimezone(zone).strftime("%H:%M"), "text": r.text, "run": None if r.run != r.run else r.run} for r in notes.itertuples() if r.at < end] if len(notes) else []
        out["apparatus"].append({
            "name": name,
            "sent_data": day in days,
            "latest_day": max(days).isoformat() if days else None,
            "figures": figures,
            "alarms": alarms,
            "notes": notes,
            "monitors": [
                {**{k: m[k] for k in ("name", "unit", "latest_value", "latest_time", "interval_seconds", "silent_seconds", "stopped_reporting")}, "latest_local": _local(m["latest_time"], zone)}
                for m in monitors
                if m["apparatus"] == name
            ],
        })
    return out


def _local(moment: str | None, zone: ZoneInfo) -> str | None:
    return None if moment is None else dt.datetime.fromisoformat(moment).astimezone(zone).strftime("%Y-%m-%d %H:%M:%S")


def _monitor_words(monitor: dict[str, object]) -> str:
    unit = f" {monitor['unit']}" if monitor["unit"] else ""
    if monitor["latest_value"] is None:
        return f"{monitor['name']}: nothing logged yet"
    return f"{monitor['name']}: {monitor['latest_value']:.6g}{unit} at {monitor['latest_local']} (every {duration_words(monitor['interval_seconds'])})"


def digest_text(digest: dict[str, object]) -> str:
    lines = [f"runlog digest for lab day {digest['day']} ({digest['lab_timezone']})", ""]
    for entry in digest["apparatus"]:
        lines.append(f"== {entry['name']}")
        if not entry["sent_data"]:
            lines.append(f"  WARNING: no data on {digest['day']} (latest {entry['latest_day'] or 'never'})")
        for figure in entry["figures"]:
            lines.append(f"  {figure['words']}")
            if figure.get("series"):
                lines.append(f"    series {figure['series']['label']}")
        lines.append(f"  open alarms: {len(entry['alarms']) or 'none'}")
        for alarm in entry["alarms"]:
            lines.append(f"    #{alarm['id']} {alarm['date']} {alarm['quantity']}: {alarm['reason']} ({alarm['method']})")
            for note in alarm["notes"]:
                lines.append(f"      {note['kind']} {note['day']}: {note['text']}")
            for words in alarm["suspects"]:
                lines.append(f"      suspect: {words}")
            lines.append(f"      {alarm['verdict']}")
        for note in entry["notes"]:
            lines.append(f"  note {note['at']}: {note['text']}")
        for monitor in entry["monitors"]:
            if monitor["stopped_reporting"]:
                lines.append(f"  WARNING: {stopped_words(monitor, ZoneInfo(digest['lab_timezone']))}")
        if entry["monitors"]:
            lines.append(f"  monitors (latest, as of {digest['monitors_as_of'][:16].replace('T', ' ')}):")
            lines += [f"    {_monitor_words(m)}" for m in entry["monitors"]]
        lines.append("")
    ingest = digest["ingest"]
    lines.append(f"ingest on {digest['day']}: {ingest['stored']} files stored, {ingest['already_present']} already present, {len(ingest['refused'])} refused")
    for refused in ingest["refused"]:
        lines.append(f"  refused {refused['file']}: {refused['reason']}")
    lines.append("advisory only: not a replacement for the lab's interlocks or rules")
    return "\n".join(lines) + "\n"


_STATE_COLOUR = {"in limits": "#2e7d32", "changed": "#b3261e", "drifting": "#b26a00", "building baseline": "#555", "no data": "#555"}


def _chart(history: list[tuple], width: int = 320, height: int = 90) -> str:
    """Inline SVG: the days' points with 95 % bars and the limits of the daily values."""
    if not history:
        return ""
    numbers = [v for row in history for v in row[1:6] if isinstance(v, (int, float))]
    low, high = min(numbers), max(numbers)
    span = (high - low) or 1.0
    first = dt.date.fromisoformat(history[0][0])
    days = max(1, (dt.date.fromisoformat(history[-1][0]) - first).days)

    def x(date: str) -> float:
        return 8 + (width - 16) * (dt.date.fromisoformat(date) - first).days / days

    def y(value: float) -> float:
        return height - 6 - (height - 12) * (value - low) / span

    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" role="img" aria-label="daily values">']
    for side in (4, 5):
        path = " ".join(f"{x(r[0]):.1f},{y(r[side]):.1f}" for r in history if isinstance(r[side], (int, float)))
        if path:
            parts.append(f'<polyline points="{path}" fill="none" stroke="#888" stroke-dasharray="4 3" stroke-width="1"/>')
    for date, value, ci_low, ci_high, _, _, outside in history:
        colour = "#b3261e" if outside else "#23395b"
        parts.append(f'<line x1="{x(date):.1f}" x2="{x(date):.1f}" y1="{y(ci_low):.1f}" y2="{y(ci_high):.1f}" stroke="{colour}" stroke-width="1"/>')
        parts.append(f'<circle cx="{x(date):.1f}" cy="{y(value):.1f}" r="2.5" fill="{colour}"/>')
    parts.append("</svg>")
    return "".join(parts)


def _monitor_row(monitor: dict[str, object]) -> str:
    e = html.escape
    value = "" if monitor["latest_value"] is None else f"{monitor['latest_value']:.6g}"
    state = "<span class='warn'>stopped reporting</span>" if monitor["stopped_reporting"] else "reporting"
    return f"<tr><td>{e(monitor['name'])}</td><td>{value}</td><td>{e(monitor['unit'])}</td><td>{e(monitor['latest_local'] or '')}</td><td>{e(duration_words(monitor['interval_seconds']))}</td><td>{state}</td></tr>"


def digest_html(digest: dict[str, object]) -> str:
    e = html.escape
    body = [f"<h1>Lab day {e(digest['day'])}</h1><p class='quiet'>lab time zone {e(digest['lab_timezone'])} · advisory only: not a replacement for the lab's interlocks or rules</p>"]
    for entry in digest["apparatus"]:
        body.append(f"<section><h2>{e(entry['name'])}</h2>")
        if not entry["sent_data"]:
            body.append(f"<p class='warn'>No data on {e(digest['day'])} (latest {e(entry['latest_day'] or 'never')}).</p>")
        body.append("<div class='cards'>")
        for figure in entry["figures"]:
            colour = _STATE_COLOUR.get(figure["state"], "#555")
            value = "" if figure.get("value") is None else f"{figure['value']:.4g} ± {figure['stderr']:.2g} {e(figure['unit'])}"
            size = "" if figure.get("size") is None else f"{figure['size']:+.3g} {e(figure['unit'])} · {figure['z']:+.1f} standard errors from baseline {figure['centre']:.4g}"
            series = e(figure["series"]["label"]) if figure.get("series") else ""
            body.append(
                f"<div class='card'><div class='name'>{e(figure['quantity'].replace('_', ' '))}</div><div class='value'>{value}</div>"
                f"<div class='state' style='color:{colour}'>{e(figure['state'])}{' since ' + e(figure['since']) if figure.get('since') else ''}</div>"
                f"<div class='quiet'>{size}</div>{_chart(figure['history'])}<div class='quiet small'>{series}</div></div>"
            )
        body.append("</div>")
        if entry["alarms"]:
            body.append("<h3>Open alarms</h3><ul>")
            for alarm in entry["alarms"]:
                items = "".join(f"<li>{e(n['kind'])} {e(n['day'])}: {e(n['text'])}</li>" for n in alarm["notes"])
                items += "".join(f"<li>suspect: {e(w)}</li>" for w in alarm["suspects"])
                body.append(f"<li>#{alarm['id']} {e(alarm['date'])} {e(alarm['quantity'])}: {e(alarm['reason'])} ({e(alarm['method'])})<ul>{items}<li><em>{e(alarm['verdict'])}</em></li></ul></li>")
            body.append("</ul>")
        else:
            body.append("<p>No open alarms.</p>")
        if entry["notes"]:
            body.append("<h3>Notes of the day</h3><ul>" + "".join(f"<li>{e(n['at'])} {e(n['text'])}</li>" for n in entry["notes"]) + "</ul>")
        if entry["monitors"]:
            body.append(f"<h3>Monitors</h3><p class='quiet'>latest values as of {e(digest['monitors_as_of'][:16].replace('T', ' '))}</p>")
            body += [f"<p class='warn'>{e(stopped_words(m, ZoneInfo(digest['lab_timezone'])))}.</p>" for m in entry["monitors"] if m["stopped_reporting"]]
            body.append("<table><tr><th>monitor</th><th>latest</th><th>unit</th><th>at</th><th>usually every</th><th>state</th></tr>" + "".join(_monitor_row(m) for m in entry["monitors"]) + "</table>")
        body.append("</section>")
    ingest = digest["ingest"]
    refused = "".join(f"<li>{e(r['file'])}: {e(str(r['reason']))}</li>" for r in ingest["refused"])
    body.append(f"<section><h2>Ingest</h2><p>{ingest['stored']} files stored, {ingest['already_present']} already present, {len(ingest['refused'])} refused.</p><ul>{refused}</ul></section>")
    style = (
        "body{font-family:sans-serif;max-width:1100px;margin:1em auto;color:#1b1b1b}.cards{display:flex;flex-wrap:wrap;gap:12px}"
        ".card{border:1px solid #ccc;border-radius:6px;padding:8px 10px;width:340px}.name{font-weight:bold}.value{font-size:1.3em}"
        ".quiet{color:#555}.small{font-size:.8em}.warn{color:#b3261e;font-weight:bold}td,th{padding:2px 10px;text-align:left}"
    )
    return f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>runlog digest {e(digest['day'])}</title><style>{style}</style></head><body>{''.join(body)}</body></html>\n"


def send_mail(digest: dict[str, object], *, environ: dict[str, str] | None = None) -> list[str]:
    """Send the digest (text and HTML parts) by SMTP; returns the recipients."""
    env = os.environ if environ is None else environ
    host = env.get("RUNLOG_SMTP_HOST")
    recipients = [r.strip() for r in env.get("RUNLOG_DIGEST_TO", "").split(",") if r.strip()]
    if not host or not recipients:
        raise ConfigError("digest e-mail", "set RUNLOG_SMTP_HOST and RUNLOG_DIGEST_TO")
    message = EmailMessage()
    message["Subject"] = f"runlog digest {digest['day']}"
    message["From"] = env.get("RUNLOG_DIGEST_FROM", "runlog@localhost")
    message["To"] = ", ".join(recipients)
    message.set_content(digest_text(digest))
    message.add_alternative(digest_html(digest), subtype="html")
    port = int(env.get("RUNLOG_SMTP_PORT", "587"))
    try:
        with smtplib.SMTP(host, port, timeout=30) as smtp:
            if env.get("RUNLOG_SMTP_STARTTLS", "1") != "0":
                smtp.starttls()
            user, password = env.get("RUNLOG_SMTP_USER"), env.get("RUNLOG_SMTP_PASSWORD")
            if user and password:
                smtp.login(user, password)
            smtp.send_message(message)
    except (OSError, smtplib.SMTPException) as error:
        # The error's own text may quote the server's reply; never the credentials.
        raise ConfigError("digest e-mail", f"sending through {host}:{port} failed: {type(error).__name__}") from None
    return recipients


def send_webhook(digest: dict[str, object], *, url: str | None = None, environ: dict[str, str] | None = None) -> int:
    """POST the digest's text as JSON ``{"text": ...}`` to a chat webhook; returns the HTTP status."""
    env = os.environ if environ is None else environ
    url = url or env.get("RUNLOG_DIGEST_WEBHOOK")
    if not url:
        raise ConfigError("digest webhook", "set RUNLOG_DIGEST_WEBHOOK or give --webhook URL")
    request = urllib.request.Request(url, data=json.dumps({"text": digest_text(digest)}).encode(), headers={"Content-Type": "application/json"}, method="POST")
    try:
        with urllib.request.urlopen(request, timeout=30) as response:
            return int(response.status)
    except OSError as error:
        raise ConfigError("digest webhook", f"posting failed: {type(error).__name__}") from None


def due_day(timezone: str, hour: int, sent: set[str], now: dt.datetime | None = None) -> dt.date | None:
    """Yesterday's lab day once the lab clock has passed ``hour`` today and it was not sent yet."""
    now = (now or dt.datetime.now(dt.timezone.utc)).astimezone(ZoneInfo(timezone))
    if now.hour < hour:
        return None
    day = now.date() - dt.timedelta(days=1)
    return None if day.isoformat() in sent else day


def send_due(catalogue, day: dt.date, *, environ: dict[str, str] | None = None) -> list[str]:
    """Send the digest of ``day`` by every channel the environment configures; log lines back."""
    env = os.environ if environ is None else environ
    digest = build_digest(catalogue, day=day)
    lines = []
    if env.get("RUNLOG_SMTP_HOST") and env.get("RUNLOG_DIGEST_TO"):
        try:
            lines.append(f"digest {day} sent to {len(send_mail(digest, environ=env))} recipients")
        except ConfigError as error:
            lines.append(str(error))
    if env.get("RUNLOG_DIGEST_WEBHOOK"):
        try:
            lines.append(f"digest {day} posted to the chat webhook (HTTP {send_webhook(digest, environ=env)})")
        except ConfigError as error:
            lines.append(str(error))
    return lines or [f"digest {day} due, but no e-mail or webhook is configured"]
