"""Command line: parse, load config, call the library, map errors to exit codes and one-line messages.

Exit codes: 0 the command ran (whatever the verdicts); 1 runtime failure; 2 usage or config error;
3 another daemon holds the store; 4 ``check`` ran but some models could not be checked (each has an
entry with verdict ``error`` and its reason).
"""

from __future__ import annotations

import json
import logging
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import date, datetime, timezone
from pathlib import Path
from typing import Any, NoReturn

import click

from drift import __version__
from drift.exceptions import ConfigError, DecisionError, DriftError, LockError

log = logging.getLogger("drift")

EXIT_RUNTIME, EXIT_CONFIG, EXIT_LOCKED, EXIT_UNCHECKED, EXIT_UNDELIVERED = 1, 2, 3, 4, 5


def _fail(code: int, msg: str) -> NoReturn:
    click.echo(f"drift: {msg}", err=True)
    sys.exit(code)


def _setup_logging(level: str) -> None:
    logging.basicConfig(level=getattr(logging, level.upper(), logging.WARNING), stream=sys.stderr,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")


def _load(config: str, need: tuple[str, ...] = ()) -> Any:
    """The validated config; ``need``: sections ('sources', 'models') the command cannot do without."""
    from drift.config import load_config

    cfg = load_config(config)
    cfg.require(*need)
    return cfg


@contextmanager
def _opened(config: str, need: tuple[str, ...] = ()) -> Iterator[tuple[Any, Any]]:
    """The loaded config (checked for the sections in ``need`` before anything is opened or created) and
    its open store, disposed of afterwards."""
    from drift.store import open_store

    cfg = _load(config, need)
    store = open_store(cfg.store_url())
    try:
        yield cfg, store
    finally:
        store.dispose()


def _name(value: str | None) -> str | None:
    """A ``--by`` value the store keeps (:func:`drift.config.check_name`): a usage error (exit 2) otherwise."""
    from drift.config import check_name

    try:
        return None if value is None else check_name(value)
    except ValueError as exc:
        raise click.BadParameter(str(exc)) from None


def _day(value: str | None, flag: str) -> date | None:
    """A date option: YYYY-MM-DD within the dates drift can compute with (:data:`drift.config.DATE_RANGE`)."""
    from drift.config import DATE_RANGE

    if value is None:
        return None
    try:
        day = date.fromisoformat(value.strip())
    except ValueError:
        _fail(EXIT_CONFIG, f"{flag} expects a date as YYYY-MM-DD, got '{value}'")
    lo, hi = DATE_RANGE
    if not lo <= day <= hi:
        _fail(EXIT_CONFIG, f"{flag} {day.isoformat()} is out of range: drift works with dates from "
                           f"{lo.isoformat()} to {hi.isoformat()}")
    return day


def _run(fn: Any) -> Any:
    """Call ``fn`` and map drift's errors to exit codes."""
    try:
        return fn()
    except (ConfigError, DecisionError) as exc:
        _fail(EXIT_CONFIG, str(exc))
    except LockError as exc:
        _fail(EXIT_LOCKED, str(exc))
    except DriftError as exc:
        _fail(EXIT_RUNTIME, str(exc))
    except KeyboardInterrupt:
        _fail(130, "interrupted")
    except Exception as exc:  # the CLI maps every failure to an exit code and one line
        log.debug("unexpected error", exc_info=True)
        _fail(EXIT_RUNTIME, f"unexpected error: {type(exc).__name__}: {exc} (run with --log-level debug "
                            "for the traceback)")


config_opt = click.option("--config", "config", required=True, type=click.Path(dir_okay=False),
                          help="drift YAML configuration file.")


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="drift")
@click.option("--log-level", default="warning", show_default=True,
              type=click.Choice(["debug", "info", "warning", "error"], case_sensitive=False))
def cli(log_level: str) -> None:
    """drift: watch deployed driver-based forecasts and say, with evidence, when the relationship moved."""
    _setup_logging(log_level)


@cli.command()
@config_opt
@click.option("--source", "sources", multiple=True, help="Only this source (repeatable).")
@click.option("--reread", is_flag=True,
              help="Read every file again, even unchanged or retracted ones (values are compared as usual).")
def ingest(config: str, sources: tuple[str, ...], reread: bool) -> None:
    """Read the configured sources into the store (new values, revisions as vintages, quarantine)."""
    _ingest_command(config, sources, reread=reread)


@cli.command()
@config_opt
@click.option("--source", "sources", multiple=True, help="Only this source (repeatable).")
def readmit(config: str, sources: tuple[str, ...]) -> None:
    """Read again the files holding open quarantine records, with the current config."""
    _ingest_command(config, sources, readmit=True)


def _ingest_command(config: str, sources: tuple[str, ...], *, reread: bool = False,
                    readmit: bool = False) -> None:
    def go() -> None:
        from drift.ingest.admin import summary_lines
        from drift.pipeline import run_ingest

        with _opened(config, need=("sources",)) as (cfg, store):
            summaries = run_ingest(cfg, store, sources=list(sources) or None, reread=reread, readmit=readmit)
        refused = unavailable = False
        if readmit and not any(s.files for s in summaries):
            click.echo("no file holds open quarantine records")
        for s in summaries:
            if readmit and not s.files:
                continue
            click.echo("\n".join(summary_lines(s, config)))
            src = next((x for x in cfg.sources if x.name == s.source), None)
            if s.files == 0 and src is not None and src.kind != "sql":
                click.echo(f"  no file matches '{src.path}' (relative to {cfg.base_dir})", err=True)
            for f, msg in s.failed_files:
                if f in s.unavailable:
                    unavailable = True
                else:
                    refused = True
                click.echo(f"  not read: {msg if msg.startswith(f) else f + ': ' + msg}", err=True)
        if refused:
            sys.exit(EXIT_CONFIG)
        if unavailable:
            sys.exit(EXIT_RUNTIME)

    _run(go)


@cli.command()
@config_opt
@click.option("--source", default=None, help="Only batches of this source.")
@click.option("--limit", default=50, show_default=True, type=click.IntRange(min=1), help="Newest batches shown.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
def batches(config: str, source: str | None, limit: int, as_json: bool) -> None:
    """List ingested batches (files and query results), newest first, with their counts and retractions."""
    def go() -> None:
        from drift.ingest.admin import BATCH_KEYS, as_json_rows, format_batches

        with _opened(config) as (_, store):
            rows = store.list_batches(source=source, limit=limit)
        click.echo(json.dumps({"batches": as_json_rows(rows, BATCH_KEYS)}) if as_json else format_batches(rows))

    _run(go)


@cli.command()
@config_opt
@click.option("--batch", "ids", multiple=True, required=True, type=int, help="Batch id (repeatable).")
@click.option("--note", default=None, help="Why, kept with the batch.")
def retract(config: str, ids: tuple[int, ...], note: str | None) -> None:
    """Mark batches and their values retracted: ignored from now on, kept for as-of queries before now."""
    def go() -> None:
        from drift.ingest.admin import retract as retract_batches

        with _opened(config) as (_, store):
            click.echo("\n".join(retract_batches(store, list(ids), note=note)))

    _run(go)


@cli.command()
@config_opt
@click.option("--source", default=None, help="Only records of this source.")
@click.option("--all", "include_resolved", is_flag=True, help="Include records resolved by a later read.")
@click.option("--limit", default=200, show_default=True, type=click.IntRange(min=1),
              help="Records shown as text (--json prints all).")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
def quarantine(config: str, source: str | None, include_resolved: bool, limit: int, as_json: bool) -> None:
    """List quarantined cells: file, row, column, raw value and reason."""
    def go() -> None:
        from drift.ingest.admin import QUARANTINE_KEYS, as_json_rows, format_quarantine

        with _opened(config) as (_, store):
            rows = store.quarantine_records(source=source, include_resolved=include_resolved)
        click.echo(json.dumps({"rows": as_json_rows(rows, QUARANTINE_KEYS)}) if as_json
                   else format_quarantine(rows, include_resolved=include_resolved, limit=limit))

    _run(go)


@cli.command()
@config_opt
@click.option("--model", "models", multiple=True, help="Only this model (repeatable).")
@click.option("--as-of", "as_of", default=None, help="Check as the data stood at the end of this day (YYYY-MM-DD).")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object on stdout and nothing else.")
@click.option("--no-deliver", is_flag=True,
              help="Record verdicts and alerts and queue their notices, but do not send anything now "
                   "(drift deliver or the daemon sends them).")
def check(config: str, models: tuple[str, ...], as_of: str | None, as_json: bool, no_deliver: bool) -> None:
    """Check each model for changes in its driver relationship, and record verdicts."""
    day = _day(as_of, "--as-of")

    def go() -> None:
        from drift.pipeline import run_check
        from drift.report import format_table

        with _opened(config, need=("models",)) as (cfg, store):
            outcome = run_check(cfg, store, as_of=day, models=list(models) or None, deliver=not no_deliver,
                                progress=False if as_json else None)  # a bar on a terminal, never with --json
        if as_json:
            # the verdict rows' encoder (orjson when installed; strict JSON, NaN as null): at 10,000 models the
            # standard encoder spent ~1.5 s CPU on this 36 MB object, orjson ~0.05 s
            from drift.store import _strict_json

            click.echo(_strict_json(outcome.as_json()))
        else:
            click.echo(format_table(outcome))
        if outcome.errors:
            sys.exit(EXIT_UNCHECKED)

    _run(go)


def _strict(obj: Any) -> Any:
    from drift.store import _jsonable

    return _jsonable(obj)


@cli.command()
@config_opt
@click.option("--resend", "resend", multiple=True, type=int, metavar="ID",
              help="Queue this uncertain or given-up outbox row again and send it (repeatable; see drift "
                   "status). An uncertain notice may then arrive twice.")
@click.option("--accept", "accept", multiple=True, type=int, metavar="ID",
              help="Record this uncertain outbox row as delivered (repeatable).")
@click.option("--dismiss", "dismiss", multiple=True, type=int, metavar="ID",
              help="Stop listing this given-up outbox row (handled another way; kept in the store, never sent; "
                   "repeatable).")
def deliver(config: str, resend: tuple[int, ...], accept: tuple[int, ...], dismiss: tuple[int, ...]) -> None:
    """Send whatever is pending in the outbox now, without waiting for retry backoffs (failed sends stay
    pending and are retried later). Exit status 5 when a notice was not delivered (failed and kept for a
    retry, uncertain, given up or deferred)."""
    def go() -> None:
        from drift.delivery.outbox import dismiss_given_up, resolve_uncertain, row_statuses
        from drift.pipeline import run_deliver

        with _opened(config) as (cfg, store):
            given = [*map(set, (resend, accept, dismiss))]
            both = sorted((given[0] & given[1]) | (given[0] & given[2]) | (given[1] & given[2]))
            if both:
                _fail(EXIT_CONFIG, f"outbox row {', '.join(map(str, both))}: give each row to one of --resend, "
                                   "--accept or --dismiss")
            found = row_statuses(store, [*resend, *accept, *dismiss])
            wrong = {i: found[i] for i in resend if found[i] not in ("uncertain", "dead")}
            wrong.update({i: found[i] for i in accept if found[i] != "uncertain"})
            wrong.update({i: found[i] for i in dismiss if found[i] != "dead"})
            if wrong:
                _fail(EXIT_CONFIG, "only uncertain outbox rows can be accepted, only given-up (dead) ones dismissed, "
                      "and only uncertain or given-up ones resent; "
                      + "; ".join(f"row {i} is {st}" for i, st in sorted(wrong.items())))
            if dismiss:
                n = dismiss_given_up(store, list(dismiss))
                click.echo(f"{n} given-up notice{'s' if n != 1 else ''} dismissed (kept in the store, no longer "
                           "listed)")
            if accept:
                n = resolve_uncertain(store, list(accept), resend=False)
                click.echo(f"{n} uncertain notice{'s' if n != 1 else ''} recorded as delivered")
            if resend:
                unsure = sorted(i for i in set(resend) if found[i] == "uncertain")
                n = resolve_uncertain(store, list(resend), resend=True)
                click.echo(f"{n} notice{'s' if n != 1 else ''} queued again")
                if unsure:
                    click.echo(f"  row{'s' if len(unsure) != 1 else ''} {', '.join(map(str, unsure))} may have "
                               "arrived the first time: the recipients may receive it twice")
            report = run_deliver(cfg, store)
        click.echo(report.describe() if hasattr(report, "describe") else str(report))
        if not getattr(report, "ok", True):  # a cron job or a unit file sees that something is still owed
            sys.exit(EXIT_UNDELIVERED)

    _run(go)


@cli.command()
@config_opt
@click.option("--since", default=None, help="Report changes since this day instead of since the last digest.")
@click.option("--send", is_flag=True, help="Queue the digest for the email channels and deliver it.")
def digest(config: str, since: str | None, send: bool) -> None:
    """Write the weekly digest (HTML with charts); with --send, email it."""
    day = _day(since, "--since")

    def go() -> None:
        from drift.pipeline import run_deliver, run_digest

        with _opened(config) as (cfg, store):
            moment = datetime.combine(day, datetime.min.time(), tzinfo=timezone.utc) if day else None
            dg = run_digest(cfg, store, since=moment, send=send)
            if send:
                run_deliver(cfg, store)
        click.echo(f"digest written to {dg.path}")

    _run(go)


@cli.command()
@config_opt
@click.option("--model", "models", multiple=True, help="Only this model (repeatable).")
@click.option("--as-of", "as_of", default=None, help="Check as the data stood at the end of this day (YYYY-MM-DD).")
@click.option("--out", default="drift-report", show_default=True, type=click.Path(file_okay=False),
              help="Folder for report.md, report.html and the charts.")
def report(config: str, models: tuple[str, ...], as_of: str | None, out: str) -> None:
    """Write the check report (Markdown, HTML and charts) for the models of a config; records nothing."""
    day = _day(as_of, "--as-of")

    def go() -> None:
        from drift.pipeline import run_check
        from drift.report import write_report

        with _opened(config, need=("models",)) as (cfg, store):
            outcome = run_check(cfg, store, as_of=day, models=list(models) or None, deliver=False, record=False)
            md, html = write_report(cfg, store, outcome, Path(out))
        click.echo(f"report: {md}")
        click.echo(f"report (HTML): {html}")
        if outcome.errors:
            sys.exit(EXIT_UNCHECKED)

    _run(go)


@cli.command()
@click.option("--out", default="drift-demo", show_default=True, type=click.Path(file_okay=False),
              help="Folder for the demo's data, store and report.")
def demo(out: str) -> None:
    """Run the bundled invented scenario end to end and write a report."""
    def go() -> None:
        from drift.demo import run_demo

        res = run_demo(out)
        click.echo(f"demo store and config: {res.config}")
        click.echo(f"report: {res.report}")
        if res.report_html:
            click.echo(f"report (HTML): {res.report_html}")
        if res.digest:
            click.echo(f"weekly digest (HTML, charts embedded): {res.digest}")

    _run(go)


@cli.command()
@config_opt
@click.option("--log-file", default=None, type=click.Path(dir_okay=False), help="Also log to this rotating file.")
@click.option("--log-level", "daemon_level", default=None,
              type=click.Choice(["debug", "info", "warning", "error"], case_sensitive=False),
              help="Log level of the daemon (default info).")
def daemon(config: str, log_file: str | None, daemon_level: str | None) -> None:
    """Run ingest, check, digest and outbox retry on the config's schedule until stopped."""
    def go() -> None:
        from drift.scheduler import run_daemon

        cfg = _load(config)
        cfg.require(*(sec for job, sec in (("ingest", "sources"), ("check", "models"))
                      if getattr(cfg.schedule, job) is not None))
        level = getattr(logging, daemon_level.upper()) if daemon_level else None
        sys.exit(run_daemon(cfg, log_file=log_file, log_level=level))

    _run(go)


@cli.command()
@config_opt
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
def status(config: str, as_json: bool) -> None:
    """Jobs, pending deliveries, stale feeds and open alerts."""
    def go() -> None:
        from drift.status import collect_status, format_status

        with _opened(config) as (cfg, store):
            st = collect_status(cfg, store)
        click.echo(json.dumps(_strict(st), default=str) if as_json else format_status(st))

    _run(go)


@cli.command()
@config_opt
@click.option("--date", "when", required=True, help="Date of the known shock (YYYY-MM-DD).")
@click.option("--model", "models", multiple=True, help="Only this model (repeatable).")
@click.option("--as-of", "as_of", default=None, help="Use the data as they stood at the end of this day.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
@click.option("--out", default=None, type=click.Path(file_okay=False), help="Folder for the charts.")
def shock(config: str, when: str, models: tuple[str, ...], as_of: str | None, as_json: bool,
          out: str | None) -> None:
    """After a known market shock: did each model's relationship change at that date?"""
    day = _day(when, "--date")
    assert day is not None  # --date is required by click
    aday = _day(as_of, "--as-of")

    def go() -> None:
        from drift.shock import format_shock, run_shock

        with _opened(config, need=("models",)) as (cfg, store):
            res = run_shock(cfg, store, day, models=list(models) or None, as_of=aday,
                            out=Path(out) if out else None)
        click.echo(json.dumps(_strict(res), allow_nan=False) if as_json else format_shock(res))

    _run(go)


@cli.command()
@config_opt
@click.option("--model", "model", required=True, help="The model to propose a new fit for.")
@click.option("--since", default=None, help="Fit on data from this day (default: the date of the refit verdict).")
@click.option("--as-of", "as_of", default=None,
              help="Use the data as they stood at the end of this day (default: the model's latest check).")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
def refit(config: str, model: str, since: str | None, as_of: str | None, as_json: bool) -> None:
    """Propose a new fit on recent data, beside the monitored one, with its out-of-sample accuracy (changes nothing)."""
    sday, aday = _day(since, "--since"), _day(as_of, "--as-of")

    def go() -> None:
        from drift.refit import format_proposal, propose

        with _opened(config, need=("models",)) as (cfg, store):
            p = propose(cfg, store, model, since=sday, as_of=aday)
        click.echo(json.dumps(_strict(p), allow_nan=False) if as_json else format_proposal(p))

    _run(go)


@cli.command()
@config_opt
@click.option("--model", "model", required=True, help="The model the decision is about.")
@click.option("--action", required=True, type=click.Choice(["refit", "relag", "drop-driver"]),
              help="What was decided.")
@click.option("--note", default=None, help="Why (kept with the decision).")
@click.option("--since", default=None,
              help="Fit the new epoch on data from this day (default: refit, the refit verdict's date; relag, "
                   "the break the relag explains, else the recent window; drop-driver, the recent window).")
@click.option("--lag", type=int, default=None, help="relag: the driver's new lag (default: the verdict's).")
@click.option("--driver", default=None, help="relag / drop-driver: the driver (default: the verdict's).")
@click.option("--by", default=None, callback=lambda ctx, param, v: _name(v),
              help="Who decided (default: the operating-system user).")
@click.option("--as-of", "as_of", default=None,
              help="The check date the decision is made at (default: the model's latest check).")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
def accept(config: str, model: str, action: str, note: str | None, since: str | None, lag: int | None,
           driver: str | None, by: str | None, as_of: str | None, as_json: bool) -> None:
    """Record a decision: start a new monitoring epoch for the model and close its open alerts as acted on."""
    sday, aday = _day(since, "--since"), _day(as_of, "--as-of")

    def go() -> None:
        from drift.refit import accept as do_accept
        from drift.refit import format_accepted

        with _opened(config, need=("models",)) as (cfg, store):
            r = do_accept(cfg, store, model, action=action, since=sday, lag=lag, driver=driver, note=note, by=by,
                          as_of=aday)
        click.echo(json.dumps(_strict(r), allow_nan=False) if as_json else format_accepted(r))

    _run(go)


@cli.command()
@config_opt
@click.option("--model", "model", required=True, help="The model whose alert to wait on.")
@click.option("--action", default=None, help="Only this alert (an action such as refit, or drop-driver:SERIES).")
@click.option("--until", "until", required=True, help="Do not send it again before this day (YYYY-MM-DD).")
@click.option("--note", default=None, help="Why (kept with the snooze).")
@click.option("--by", default=None, callback=lambda ctx, param, v: _name(v),
              help="Who decided (default: the operating-system user).")
def snooze(config: str, model: str, action: str | None, until: str, note: str | None, by: str | None) -> None:
    """Wait on an open alert: not sent again until a day, unless it gets worse."""
    uday = _day(until, "--until")
    assert uday is not None  # --until is required by click

    def go() -> None:
        from drift.delivery.alerts import snooze as do_snooze
        from drift.refit import decided_by

        with _opened(config, need=("models",)) as (cfg, store):
            cfg.model(model)
            done = do_snooze(store, model, until=uday, action=action, decided_by=decided_by(by), note=note)
        for a in done:
            click.echo(f"{a.model}: {a.condition} snoozed until {uday.isoformat()} by {a.snoozed_by} "
                       "(sent again then if still open, or at once if it gets worse)")

    _run(go)


@cli.command()
@config_opt
@click.option("--model", "model", required=True, help="The model.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object.")
def history(config: str, model: str, as_json: bool) -> None:
    """The model's monitoring epochs, with the verdicts and alerts of each."""
    def go() -> None:
        from drift.epochs import format_history, model_history

        with _opened(config, need=("models",)) as (cfg, store):
            h = model_history(cfg, store, model)
        click.echo(json.dumps(_strict(h), default=str) if as_json else format_history(h))

    _run(go)


def main() -> None:
    cli(prog_name="drift")


if __name__ == "__main__":  # pragma: no cover
    main()
