"""The ``rwls`` command line: ``serve``, ``demo``, ``simulate``, offline ``replay`` and ``fit``, ``check-config``,
``token``.

Exit status: 0 done, 1 the data file cannot be used, 2 bad usage or configuration.
Bad rows never fail a run; they are counted and listed with their line numbers.
"""

from __future__ import annotations

import argparse
import gc
import json
import logging
import math
import re
import sys
from collections.abc import Sequence
from datetime import UTC, datetime, timedelta
from pathlib import Path

from service.advisory import ADVISORY
from service.api.listen_socket import PortUnavailable, bind_listener
from service.config.settings import ConfigError, RwlsConfig, load_config
from service.config.token_settings import ROLES, TokenConfig
from service.offline.csv_source import CsvError
from service.offline.replay import RunResult, fit_file, replay_file, sweep_file
from service.offline.tables import render_sweep, render_text
from service.offline.trace import ReplayTrace
from service.tags.tag_path import tag_path_of

__all__ = ["build_parser", "main"]

log = logging.getLogger("rwls")


# A budget leaving one detector of one channel more false alarms a day than this earns a warning: a plant-wide
# figure (EEMUA 191's one alarm per ten minutes per operator, for instance) shared by very few channels.
GENEROUS_BUDGET_PER_DAY = 3.0


class _HelpWithDefaults(argparse.ArgumentDefaultsHelpFormatter):
    """Shows an option's default where it has one (not "default: None")."""

    def _get_help_string(self, action: argparse.Action) -> str | None:
        return action.help if action.default is None else super()._get_help_string(action)


def build_parser() -> argparse.ArgumentParser:
    """The `rwls` command line, every subcommand with its options."""
    parser = argparse.ArgumentParser(
        prog="rwls", description="Recursive weighted least squares for sensor monitoring. " + ADVISORY)
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    for name, helptext in (("replay", "run a CSV history through the recursive estimator"),
                           ("fit", "batch closed-form WLS on a CSV history (commissioning baseline)")):
        cmd = sub.add_parser(name, help=helptext, description=(
            helptext + ". The CSV is wide (a sample per row) or long (a tag update per row, as historians export "
            "it; the samples are assembled from the tags as the service assembles them), told apart by its header."))
        cmd.add_argument("data", help="CSV file; wide: y, inputs, optional t, sigma, weight, channel; long: time, "
                                      "tag, value, optional quality (and no y)")
        cmd.add_argument("-c", "--config", required=True,
                         help="TOML file with [channels.<id>] tables (and [tags], for a long file)")
        cmd.add_argument("--json", action="store_true", help="print the result as JSON")
        if name == "replay":
            cmd.add_argument("--forgetting-factor", type=_values, metavar="LAMBDA[,LAMBDA...]",
                             help="override every channel's forgetting factor; several values (and several of "
                                  "the threshold overrides below) compare every combination side by side, in "
                                  "one pass over the file")
        else:
            cmd.add_argument("--forgetting-factor", type=float, metavar="LAMBDA",
                             help="override every channel's forgetting factor")
        cmd.add_argument("--no-progress", action="store_true", help="never show the progress bar")
        if name == "replay":
            cmd.add_argument("--report", metavar="OUT.html",
                             help="also write a commissioning report: plots per channel, alarms, OLS against WLS")
            cmd.add_argument("--offset-h", type=_values, metavar="H[,H...]",
                             help="override every offset CUSUM threshold (several: a sweep)")
            cmd.add_argument("--variance-h", type=_values, metavar="H[,H...]",
                             help="override every variance CUSUM threshold (several: a sweep)")
            cmd.add_argument("--drift-alpha", type=_values, metavar="ALPHA[,ALPHA...]",
                             help="override every drift test's level per check (several: a sweep)")

    helptext = "validate a configuration file and explain errors by key"
    check = sub.add_parser("check-config", help=helptext, description=(
        helptext + ": every problem in one pass, each naming its key; with a false-alarm budget, the thresholds "
        "it derives and their detection delays. Exit status 0 when the file can be used, 2 when not."))
    check.add_argument("config", help="TOML file")
    check.add_argument("--serve", action="store_true", help="also require what serving needs (channel topics; "
                                                            "HTTPS beyond loopback with write tokens)")

    helptext = "run the live service: MQTT ingest, engine and REST API (and the dashboard at /)"
    serve = sub.add_parser("serve", help=helptext, description=(
        helptext + ". Subscribes to every channel's topic on the configured broker, applies samples as they "
        "arrive, keeps the state in the store (see the README, State that survives) and serves it over HTTP. "
        "Run it as one process: it takes an exclusive lock on its data directory. " + ADVISORY))
    serve.add_argument("-c", "--config", required=True, help="TOML file (RWLS_* environment variables override)")
    serve.add_argument("--host", help="override http.host (default: the file's, else 127.0.0.1)")
    serve.add_argument("--port", type=int, help="override http.port (default: the file's, else 8080; 0: any free "
                                                "port, printed at start)")
    serve.add_argument("--log-level", default="info", choices=["debug", "info", "warning", "error"],
                       help="how much the service logs (default: info)")
    serve.add_argument("--shard", metavar="K/N", help="override fleet.shard: own the channels whose stable hash "
                                                      "mod N is K (auto/N: K from the host name's -<ordinal>)")

    helptext = "embedded MQTT broker + simulated plant + service + dashboard, all in this process"
    demo = sub.add_parser("demo", help=helptext, formatter_class=_HelpWithDefaults,
                          description=helptext + ": the invented Larkspur Valley substation 7 in compressed time "
                          "(a minute of demo shows days of plant). Prints the dashboard's URL and a fresh engineer "
                          "token. State is kept in --data-dir: a second run carries on where the first stopped. "
                          + ADVISORY)
    demo.add_argument("--host", default="127.0.0.1", help="address the HTTP face listens on")
    demo.add_argument("--port", type=int, default=8080, help="HTTP port (0: any free port, printed at start)")
    demo.add_argument("--rate", type=float, default=200.0, help="tag messages per second the plant publishes, "
                                                                "all tags together")
    demo.add_argument("--data-dir", default="rwls-demo-data",
                      help="where the demo keeps its state, relative to the working directory; delete it to start "
                           "the plant's month afresh")
    demo.add_argument("--exit-after", type=float, metavar="SECONDS", help="stop by itself (smoke tests)")

    helptext = "make an API token: prints it once, and the [[auth.tokens]] entry to add"
    token = sub.add_parser("token", help=helptext, description=(
        helptext + ". The token goes to standard output (give it to its holder; it is not stored anywhere), "
        "the settings entry with its SHA-256 to standard error."))
    token.add_argument("--name", required=True, help="its holder, as the alarm journal will record it")
    token.add_argument("--role", required=True, choices=list(ROLES), help="what it may do (see README, Access)")
    token.add_argument("--expires", metavar="WHEN",
                       help="when it ends: a span from now (90d, 12h, 30m) or a UTC date-time (2027-03-05 or "
                            "2027-03-05T11:30:00Z); written into the entry (default: never)")

    helptext = "publish the demo plant (Larkspur Valley, substation 7) to a broker"
    simulate = sub.add_parser("simulate", help=helptext, formatter_class=_HelpWithDefaults, description=(
        helptext + ", QoS 1, in compressed time (each scan advances the plant clock by ten minutes). "
        "--payload tags (the default): one topic per instrument tag, <prefix>/sub7/<TAG> and "
        "<prefix>/sub7/boiler/<TAG>, each message JSON {\"v\": value, \"ts\": epoch milliseconds, \"q\": "
        "quality}; at every scan each channel's input tags before its output tag; the return reference probe and "
        "the vessel level by exception (only when they change). examples/larkspur_sub7.toml assembles the "
        "channels from them. --payload samples: rwls's own sample payload instead, one topic per channel, "
        "<prefix>/sub7/<channel>, each message {\"t\", \"y\", \"u\", \"seq\"} (examples/"
        "larkspur_sub7_samples.toml)."))
    simulate.add_argument("--broker", default="mqtt://127.0.0.1:1883", help="mqtt://host:port")
    simulate.add_argument("--prefix", default="larkspur", help="topic prefix (the plant's topics go under it)")
    simulate.add_argument("--payload", default="tags", choices=["tags", "samples"],
                          help="tags: one message per instrument tag; samples: one whole sample per channel")
    simulate.add_argument("--rate", type=float, default=200.0, help="messages per second, all topics together")
    simulate.add_argument("--samples", type=int, metavar="SCANS",
                          help="scans of the plant to publish, ten minutes of plant time each (default: until "
                               "Ctrl-C)")
    simulate.add_argument("--seed", type=int, default=7, help="seed of the plant's noise: the same seed publishes "
                                                              "the same messages")
    return parser


def _values(text: str) -> list[float]:
    """``0.99,0.995``: one value or several, comma-separated."""
    try:
        return [float(part) for part in text.split(",")]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number or numbers separated by commas, got {text!r}") from None


THRESHOLDS = ("offset_h", "variance_h", "drift_alpha")


def _settings(args: argparse.Namespace) -> list[dict[str, float]]:
    """Every combination of ``replay``'s override values, in the order given (one setting: no lists)."""
    settings: list[dict[str, float]] = [{}]
    for name in ("forgetting_factor", *THRESHOLDS):
        values = getattr(args, name)
        if values is not None:
            settings = [{**setting, name: value} for setting in settings for value in values]
    return settings


def _with_thresholds(config: RwlsConfig, given: dict[str, float]) -> RwlsConfig:
    """The detector threshold overrides of ``replay`` (those of ``given``) applied to every channel."""
    given = {name: value for name, value in given.items() if name in THRESHOLDS}
    problems = [f"--{name.replace('_', '-')}: must be positive, got {value}" for name, value in given.items()
                if not (math.isfinite(value) and value > 0.0)]
    if "drift_alpha" in given and not given["drift_alpha"] < 1.0:
        problems.append(f"--drift-alpha: must be below 1, got {given['drift_alpha']}")
    if problems:
        raise ConfigError(problems)
    channels = {}
    for cid, ch in config.channels.items():
        d = ch.detectors
        d = d.model_copy(update={
            "offset": d.offset.model_copy(update={"h": given.get("offset_h", d.offset.h)}),
            "variance": d.variance.model_copy(update={"h": given.get("variance_h", d.variance.h)}),
            "drift": d.drift.model_copy(update={"alpha": given.get("drift_alpha", d.drift.alpha)})})
        channels[cid] = ch.model_copy(update={"detectors": d})
    return config.model_copy(update={"channels": channels})


def _write_report(result: RunResult, trace: ReplayTrace, args: argparse.Namespace,
                  overrides: dict[str, float]) -> None:
    from service.offline.report import build_report  # matplotlib only when a report is asked for

    def progress(channel: str) -> None:
        if not args.no_progress and sys.stderr.isatty():
            print(f"rwls replay: report, channel {channel}", file=sys.stderr)

    page = build_report(result, trace, data=args.data, config=args.config, advisory=ADVISORY,
                        overrides=overrides, progress=progress)
    Path(args.report).write_text(page, encoding="utf-8")
    print(f"rwls replay: report written to {args.report}", file=sys.stderr)


def _with_forgetting(config: RwlsConfig, value: float | None) -> RwlsConfig:
    if value is None:
        return config
    if not (0.0 < value <= 1.0):
        raise ConfigError([f"--forgetting-factor: must be in (0, 1], got {value}"])
    channels = {cid: ch.model_copy(update={"forgetting_factor": value}) for cid, ch in config.channels.items()}
    return config.model_copy(update={"channels": channels})


def _serve(args: argparse.Namespace) -> int:
    import ssl

    from service.api.app import create_app
    from service.api.server import PlainHttpRefused, http_server, plain_http_warnings
    from service.runtime import AlreadyRunning, Runtime, exit_on_signal

    # Start-up makes objects that live as long as the process (100,000 channels: millions): the collector's
    # passes over them would double the time to read and build them (measured), and find nothing to free.
    # Runtime.start() freezes them out of its way; it runs again from there.
    gc.disable()
    try:
        config = load_config(args.config)
        if args.shard:
            config = config.model_copy(update={"fleet": config.fleet.model_copy(update={"shard": args.shard})})
        host = args.host or config.http.host
        try:
            warnings = plain_http_warnings(config, host)
        except PlainHttpRefused as exc:
            print(f"rwls serve: refusing to start: {exc}", file=sys.stderr)
            return 2
        runtime = Runtime(config)           # checks the topics and the shard (ConfigError by key)
        # One process, one worker: the engine is the single writer (see service/runtime.py).
        app = create_app(runtime, manage_runtime=False)
        app.state.http_warnings = warnings
        try:
            server = http_server(app, config, log_level=args.log_level)      # loads the TLS files now
        except (ssl.SSLError, OSError) as exc:
            print(f"rwls serve: cannot load the TLS files (http.tls_cert_file, http.tls_key_file, "
                  f"http.tls_client_ca_file): {exc}", file=sys.stderr)
            return 2
        _raise_descriptor_limit(config.http.max_connections)
        port = config.http.port if args.port is None else args.port
        sock = bind_listener(host, port)     # PortUnavailable: one line naming the port (main)
        try:
            runtime.start()                 # takes the ingest lock first: fails fast if another process owns it
        except AlreadyRunning as exc:
            print(f"rwls: {exc}", file=sys.stderr)
            return 2
    finally:
        gc.enable()
    for warning in warnings:
        log.warning("%s", warning)
    scheme = "https" if config.http.tls else "http"
    print(f"rwls: serving {scheme}://{host}:{sock.getsockname()[1]}/ ; {ADVISORY}", flush=True)
    exit_on_signal()
    try:
        server.run(sockets=[sock])
    finally:
        runtime.stop()
    return 0


def _raise_descriptor_limit(connections: int) -> None:
    """Raise the soft limit of open files to the hard one (common practice for servers), and warn when even
    that leaves too few for ``connections`` plus the store's and the broker's."""
    import resource

    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if hard == resource.RLIM_INFINITY or soft < hard:
        target = hard if hard != resource.RLIM_INFINITY else max(soft, connections + 1024)
        try:
            resource.setrlimit(resource.RLIMIT_NOFILE, (target, hard))
            soft = target
        except (ValueError, OSError):
            pass
    if soft < connections + 256:
        log.warning("open-file limit %d leaves too few descriptors for http.max_connections = %d: raise the "
                    "limit (LimitNOFILE in the systemd unit) or lower the setting", soft, connections)


def _simulate(args: argparse.Namespace) -> int:
    from service.config.settings import parse_config
    from service.demo.simulate import simulate

    broker = parse_config({"channels": {"x": {"terms": ["1"]}}, "broker": {"url": args.broker}}).broker
    print(f"rwls simulate: publishing the demo plant's {args.payload} to {args.broker} under {args.prefix}/ at "
          f"{args.rate:g} messages/s", flush=True)
    try:
        stats = simulate(broker.host, broker.port, prefix=args.prefix, payload=args.payload, rate=args.rate,
                         samples=args.samples, seed=args.seed)
    except ConnectionError as exc:
        print(f"rwls simulate: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 0
    print(f"rwls simulate: published {stats.published}, acknowledged {stats.acknowledged}, "
          f"refused {stats.refused}")
    return 0 if stats.refused == 0 and stats.acknowledged == stats.published else 1


_SPANS = {"d": 86400, "h": 3600, "m": 60}


def token_end(text: str, now: datetime) -> datetime:
    """The end ``--expires`` names: ``90d``/``12h``/``30m`` from ``now``, or a date or date-time (UTC unless
    it carries an offset), to the second; ValueError saying what it takes."""
    span = re.fullmatch(r"([1-9][0-9]{0,5})([dhm])", text.strip())
    if span:
        end = now + timedelta(seconds=int(span.group(1)) * _SPANS[span.group(2)])
    else:
        try:
            end = datetime.fromisoformat(text.strip())
        except ValueError:
            raise ValueError(f"--expires takes 90d, 12h, 30m, a date (2027-03-05) or a UTC date-time "
                             f"(2027-03-05T11:30:00Z), got {text!r}") from None
        end = end if end.utcoffset() is not None else end.replace(tzinfo=UTC)
    if end <= now:
        raise ValueError(f"--expires {text!r} is already past")
    return end.astimezone(UTC).replace(microsecond=0)


def _token(args: argparse.Namespace) -> int:
    from pydantic import ValidationError

    from service.api.auth import new_token, token_digest

    token = new_token()
    try:
        expires = None if args.expires is None else token_end(args.expires, datetime.now(UTC))
    except ValueError as exc:
        print(f"rwls token: {exc}", file=sys.stderr)
        return 2
    try:
        entry = TokenConfig(name=args.name, role=args.role, sha256=token_digest(token), expires=expires)
    except ValidationError as exc:
        print(f"rwls token: --name {exc.errors()[0]['msg'].removeprefix('Value error, ')}", file=sys.stderr)
        return 2
    ends = "" if expires is None else f"expires = {expires.isoformat().replace('+00:00', 'Z')}\n"
    print(token)
    print(f"# Give the token above to its holder; it is shown only now. Add to the settings file:\n"
          f"[[auth.tokens]]\nname = {json.dumps(entry.name)}\nrole = {json.dumps(entry.role)}\n"
          f"sha256 = {json.dumps(entry.sha256)}\n{ends}", end="", file=sys.stderr)
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``rwls`` console script; returns the exit status."""
    args = build_parser().parse_args(argv)
    if args.command in ("serve", "demo"):
        from service.runtime import tune_for_serving

        tune_for_serving()
    level = logging.INFO if args.command in ("serve", "demo") else logging.WARNING
    logging.basicConfig(level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    for chatty in ("amqtt", "transitions"):      # the embedded broker's state machine logs every step
        logging.getLogger(chatty).setLevel(logging.WARNING)
    try:
        if args.command == "check-config":
            config = load_config(args.config)
            if args.serve:
                from service.api.server import PlainHttpRefused, plain_http_warnings

                config.require_topics()
                try:
                    for warning in plain_http_warnings(config, config.http.host):
                        print(f"warning: {warning}", file=sys.stderr)
                except PlainHttpRefused as exc:
                    raise ConfigError([f"http: {exc}"]) from None
            tags = tag_path_of(config)
            print(f"{args.config}: ok, {len(config.channels)} channel(s): {', '.join(config.channels)}")
            if tags is not None:
                print(f"tags: {len(tags.assembler.tag_ids)} named by {len(tags.channel_ids)} channel(s), "
                      f"{len(tags.subscriptions())} topic filter(s)")
            budget = config.budget_thresholds()
            if budget is not None:
                print(f"false-alarm budget: {budget.explain()}")
                per_day = budget.rate_per_detector * 86400.0
                if per_day > GENEROUS_BUDGET_PER_DAY:
                    print(f"warning: the budget leaves each detector of each channel {per_day:.3g} false alarms a "
                          f"day (more than {GENEROUS_BUDGET_PER_DAY:g}): with {budget.channels} channel(s) it is "
                          f"shared by few; operators will learn to ignore alarms that often. Lower "
                          f"alarms.budget.false_alarms or raise alarms.budget.per_seconds.", file=sys.stderr)
            return 0
        if args.command == "serve":
            return _serve(args)
        if args.command == "demo":
            from service.demo.run import run_demo
            try:
                return run_demo(host=args.host, port=args.port, rate=args.rate, data_dir=args.data_dir,
                                exit_after=args.exit_after)
            except KeyboardInterrupt:
                return 0
        if args.command == "simulate":
            return _simulate(args)
        if args.command == "token":
            return _token(args)
        config = load_config(args.config)
        show = False if args.no_progress else None
        if args.command == "replay":
            settings = _settings(args)
            configs = [_with_thresholds(_with_forgetting(config, setting.get("forgetting_factor")), setting)
                       for setting in settings]
            if len(settings) > 1:
                if args.report:
                    raise ConfigError(["--report: one setting at a time (give each override one value)"])
                results = sweep_file(args.data, configs, show_progress=show)
                if args.json:
                    document = {"sweep": [{"setting": setting, **r.to_json()}
                                          for setting, r in zip(settings, results, strict=True)]}
                    json.dump(document, sys.stdout, indent=2, allow_nan=False)
                    sys.stdout.write("\n")
                else:
                    sys.stdout.write(render_sweep(results, settings))
                return 0
            overrides = settings[0]
            trace = ReplayTrace() if args.report else None
            result: RunResult = replay_file(args.data, configs[0], show_progress=show, trace=trace)
            if trace is not None:
                _write_report(result, trace, args, overrides)
        else:
            result = fit_file(args.data, _with_forgetting(config, args.forgetting_factor), show_progress=show)
    except ConfigError as exc:
        print("configuration error:", file=sys.stderr)
        for problem in exc.problems:
            print(f"  {problem}", file=sys.stderr)
        return 2
    except CsvError as exc:
        print(f"data error: {exc}", file=sys.stderr)
        return 1
    except PortUnavailable as exc:
        print(f"rwls {args.command}: {exc}", file=sys.stderr)
        return 2
    if args.json:
        json.dump(result.to_json(), sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(render_text(result, args.command))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
