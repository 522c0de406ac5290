"""The ``streamrate`` command line: thin wrappers that parse options and call the package."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated, Any

import typer
from typer.core import TyperArgument, TyperGroup

from streamrate.errors import StreamrateError

# Metavars for help texts by Python type, so that no Python type shows (``<list[str]>``).
_METAVARS = {int: "N", float: "NUMBER", str: "TEXT", Path: "PATH", bool: "BOOL"}


def _fail(message: str) -> typer.Exit:
    """Print one ``error:`` line on stderr; the exit (code 2) to raise."""
    typer.echo(f"error: {message}", err=True)
    return typer.Exit(2)


def _metavar(param: Any) -> str:
    """``N``, ``NUMBER``, ``TEXT``, ``PATH`` from the annotation (a list: its items)."""
    desc = getattr(param, "type_descriptor", None)
    annotation = getattr(desc, "annotation", None)
    for arg in (annotation, *getattr(annotation, "__args__", ())):
        if arg in _METAVARS:
            return _METAVARS[arg]
    return "VALUE"


class _PlainArgument(TyperArgument):
    """An argument shown as ``FILE`` (``[FILE]`` when optional), with no type beside it."""

    def display_type_rich(self, ctx: Any) -> str:  # typer's own (vendored) click Context
        return ""

    def _usage_display_name(self) -> str:
        name = (self.metavar or "") + ("..." if self.nargs != 1 else "")
        return name if self.required else f"[{name}]"


class _Commands(TyperGroup):
    """The command group: one line and exit code 2 for any error of the tree, plain help."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        for command in self.commands.values():
            for param in command.params:
                if param.metavar is not None or getattr(param, "is_flag", False):
                    continue
                if isinstance(param, TyperArgument):
                    param.metavar = (param.name or "value").upper()
                    param.__class__ = _PlainArgument
                else:
                    param.metavar = _metavar(param)

    def invoke(self, ctx: Any) -> Any:  # typer's own (vendored) click Context
        import redis

        try:
            return super().invoke(ctx)
        except StreamrateError as exc:
            raise _fail(str(exc)) from exc
        except redis.RedisError as exc:
            raise _fail(f"Redis: {exc}") from exc


app = typer.Typer(
    cls=_Commands,
    help="streamrate keeps win probabilities current as match results stream in.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,  # help texts show [brackets] literally
)


def _show_version(value: bool) -> None:
    if value:
        from streamrate import __version__

        typer.echo(f"streamrate {__version__}")
        raise typer.Exit()


@app.callback()
def _main(
    version: Annotated[
        bool,
        typer.Option(
            "--version", callback=_show_version, is_eager=True, help="Print the version and exit."
        ),
    ] = False,
) -> None:
    """streamrate keeps win probabilities current as match results stream in."""


@app.command()
def schema() -> None:
    """Print the JSON Schema of a match event (the format of event files and stream entries)."""
    from streamrate.events import event_schema

    typer.echo(json.dumps(event_schema(), indent=2))


Opt = typer.Option


@app.command()
def simulate(
    out: Annotated[
        Path, Opt("--out", "-o", metavar="FILE", help="Event file to write (JSON lines).")
    ],
    world: Annotated[
        str,
        Opt(
            metavar="NAME",
            help="Preset world: plain, cyclic (3 styles + map effects), patch, teams, "
            "seasons (a league whose strengths change between seasons).",
        ),
    ] = "plain",
    entities: Annotated[int | None, Opt(help="Number of players.")] = None,
    matches: Annotated[int | None, Opt(help="Number of matches.")] = None,
    team_size: Annotated[int | None, Opt(help="Players per side (1 = solo).")] = None,
    skill_spread: Annotated[float | None, Opt(help="Std of skills (logit scale).")] = None,
    styles: Annotated[
        int | None, Opt(help="Cyclic styles (0 = none, 3 = rock-paper-scissors).")
    ] = None,
    cycle_strength: Annotated[
        float | None, Opt(help="Logit edge of a style over the next one.")
    ] = None,
    map_effect: Annotated[
        float | None, Opt(help="Logit edge a map gives its favoured style.")
    ] = None,
    draw_rate: Annotated[
        float | None, Opt(help="P(draw) between equal sides (Davidson's model).")
    ] = None,
    arrival_fraction: Annotated[
        float | None, Opt(help="Share of players present at the start; the rest arrive later.")
    ] = None,
    drift: Annotated[
        float | None, Opt(help="Std of each skill's random walk over the whole run.")
    ] = None,
    patch_at: Annotated[
        float | None, Opt(help="Balance patch at this fraction of the matches.")
    ] = None,
    patch_shift: Annotated[
        float | None, Opt(help="Logit shift of style strengths by the patch.")
    ] = None,
    features: Annotated[
        bool | None,
        Opt("--features/--no-features", help="Add style_hint and training_hours features."),
    ] = None,
    days: Annotated[float | None, Opt(help="Time span of the matches in days.")] = None,
    seed: Annotated[int | None, Opt(help="Random seed (same seed, same file).")] = None,
    seasons: Annotated[
        int | None, Opt(help="Seasons of a league (0 = none); context field 'season'.")
    ] = None,
    season_shift: Annotated[
        float | None, Opt(help="Std of each skill's change between seasons.")
    ] = None,
    turnover: Annotated[
        float | None, Opt(help="Share of the roster replaced by newcomers each season.")
    ] = None,
    first_edge: Annotated[
        float | None, Opt(help="Logit edge of the first side (seasons worlds).")
    ] = None,
    truth: Annotated[
        bool,
        Opt("--truth/--no-truth", help="Also write OUT.truth.json with true expected scores."),
    ] = True,
) -> None:
    """Write an invented Quillrock world with known win probabilities, and its log-loss floor."""
    knobs = {k: v for k, v in locals().items() if k not in ("out", "world", "truth")}
    from streamrate.errors import StreamrateError
    from streamrate.evaluate import TextProgress
    from streamrate.simulate import simulate as draw_world
    from streamrate.simulate import summary, world_spec, write_world

    try:
        spec = world_spec(world, **knobs)
        bar = TextProgress(spec.matches, "simulate")
        drawn = draw_world(spec, progress=bar.update)
        bar.close()
        side = write_world(drawn, out, truth=truth)
    except StreamrateError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(2) from exc
    typer.echo(summary(drawn), err=True)
    typer.echo(f"wrote {out}" + (f" and {side}" if side else ""), err=True)


_MODEL_HELP = (
    "Model to run, repeatable: [LABEL=]KIND[:KEY=VALUE,...], e.g. elo, "
    "'blade_chest:dims=16,lr=0.05', 'wide=blade_chest:dims=32'. Values are JSON "
    "(numbers, true/false) or plain text. The first model is the reference."
)


@app.command()
def replay(
    file: Annotated[Path, typer.Argument(help="Time-ordered event file (JSON lines).")],
    model: Annotated[
        list[str] | None, Opt("--model", "-m", metavar="SPEC", help=_MODEL_HELP)
    ] = None,
    config: Annotated[
        list[Path] | None,
        Opt(
            "--config",
            "-c",
            metavar="FILE",
            help="TOML file with [models.LABEL] tables (kind, settings).",
        ),
    ] = None,
    all_models: Annotated[
        bool, Opt("--all-models", help="Run every built-in model with its default settings.")
    ] = False,
    burn_in: Annotated[
        str | None,
        Opt(
            metavar="N|TIME",
            help="Score only events after this: an event count (5000) or a time "
            "(YYYY-MM-DD = midnight UTC, or RFC 3339). All events still train.",
        ),
    ] = None,
    as_json: Annotated[bool, Opt("--json", help="Print one JSON object keyed by model.")] = False,
    plot: Annotated[
        Path | None, Opt(metavar="PNG", help="Write a reliability diagram PNG here.")
    ] = None,
    allow_unordered: Annotated[
        bool,
        Opt(
            "--allow-unordered",
            help="Replay in file order even when finished_at goes backwards (else an error).",
        ),
    ] = False,
) -> None:
    """Prequential replay: each model predicts each match, then learns from it.

    Log loss (nats) and Brier score are taken on the first side's expected score
    P(win) + P(draw)/2 against its score 1 / 0.5 / 0; accuracy over decisive
    matches; ECE on 10 equal-width bins weighted by count; calibration slope and
    intercept from a logistic regression of the score on logit(forecast). Every
    model after the first gets a 95% paired circular block bootstrap interval
    (2000 resamples, seed 0) of its mean log-loss difference to the first.
    If FILE.truth.json exists (from `streamrate simulate`), the floor is shown.
    """
    from streamrate.errors import StreamrateError
    from streamrate.evaluate import format_table, run_replay
    from streamrate.modelspec import builtin_specs, parse_model_spec, specs_from_toml, unique_specs

    try:
        specs = [parse_model_spec(m) for m in model or []]
        for path in config or []:
            specs.extend(specs_from_toml(path))
        if all_models:
            specs.extend(builtin_specs())
        report = run_replay(
            file,
            unique_specs(specs),
            burn_in=burn_in,
            plot=plot,
            allow_unordered=allow_unordered,
        )
    except StreamrateError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(2) from exc
    if as_json:
        typer.echo(json.dumps(report.to_json(), indent=2))
    else:
        typer.echo(format_table(report))
    if plot is not None:
        typer.echo(f"wrote {plot}", err=True)


def _service_settings(
    config: Path | None, redis_url: str | None, overrides: list[str] | None
) -> Any:
    from streamrate.config import load_settings

    sets = list(overrides or [])
    if redis_url is not None:
        sets.append(f"redis.url={redis_url}")
    return load_settings(config, sets)


ConfigOpt = Annotated[
    Path | None,
    typer.Option(
        "--config", "-c", metavar="FILE", help="Settings file (TOML), e.g. configs/service.toml."
    ),
]
RedisOpt = Annotated[
    str | None,
    typer.Option(
        "--redis-url",
        metavar="URL",
        help="redis:// or rediss:// URL. A password here shows in the process list: "
        "prefer redis.password_env or redis.password_file.",
    ),
]
SetOpt = Annotated[
    list[str] | None,
    typer.Option(
        "--set", metavar="KEY=VALUE", help="Override a setting: dotted.key=value (repeatable)."
    ),
]
SpaceOpt = Annotated[
    str | None, typer.Option("--space", metavar="NAME", help="Model space (default: the first).")
]


@app.command()
def serve(
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    log_format: Annotated[
        str | None,
        typer.Option("--log-format", help="text, or json: one JSON object per line."),
    ] = None,
    role: Annotated[
        str,
        typer.Option(
            help="writer: learn, checkpoint and write the applied log; responder: follow the "
            "writer and answer the request stream; both: one process doing all (default); "
            "standby: a responder that becomes the writer when the writer lease lapses; "
            "shared: one of several processes sharing the spaces, each writing its fair share."
        ),
    ] = "both",
    spaces: Annotated[
        str | None,
        typer.Option(
            "--spaces",
            metavar="NAMES",
            help="The spaces this process serves: names separated by commas, or all "
            "(default: all spaces of the config).",
        ),
    ] = None,
) -> None:
    """Consume the event stream, keep the model current, answer queries (until SIGTERM)."""
    from streamrate.connect import service_clients
    from streamrate.errors import ConfigError, StreamrateError
    from streamrate.heap import fix_malloc_thresholds
    from streamrate.logs import setup_logging
    from streamrate.service import serve_forever

    fix_malloc_thresholds()  # a long-running process: give freed large blocks back
    try:
        if role not in ("writer", "responder", "both", "standby", "shared"):
            raise ConfigError(f"--role {role!r}: one of writer, responder, both, standby, shared")
        extra = [] if log_format is None else [f"log_format={log_format}"]
        settings = _service_settings(config, redis_url, [*(set_ or []), *extra]).only(spaces)
        setup_logging(settings.log_level, settings.log_format)
        code = serve_forever(settings, service_clients(settings.redis), role)  # type: ignore[arg-type]
    except StreamrateError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(2) from exc
    raise typer.Exit(code)


@app.command()
def send(
    file: Annotated[Path, typer.Argument(help="JSON-lines event file.", exists=True)],
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    space: SpaceOpt = None,
    rate: Annotated[
        float | None, typer.Option(help="Events per second (default: flat out).")
    ] = None,
) -> None:
    """Add the events of FILE to a space's stream (one entry per line, field 'event')."""
    import redis as redis_lib

    from streamrate.client import event_lines, send_events
    from streamrate.connect import RedisClients, explain
    from streamrate.errors import StreamrateError
    from streamrate.evaluate import TextProgress

    clients: RedisClients | None = None
    try:
        settings = _service_settings(config, redis_url, set_)
        sp = settings.space(space)
        clients = RedisClients(settings.redis)
        client = clients()
        total = sum(1 for _ in event_lines(file))
        bar = TextProgress(total, f"send {sp.name}")
        n = send_events(
            client,
            settings.keys(sp).events,
            event_lines(file),
            sp.event_field,
            rate,
            progress=bar.update,
        )
        bar.close()
    except (StreamrateError, redis_lib.RedisError) as exc:
        typer.echo(f"error: {explain(exc, clients)}", err=True)
        raise typer.Exit(2) from exc
    typer.echo(f"sent {n} entries to {settings.keys(sp).events}")


def _side(text: str) -> list[str]:
    return [x.strip() for x in text.split(",") if x.strip()]


def _pairing_problem(first: list[str], second: list[str], ctx: dict[str, Any]) -> str | None:
    """What is wrong with a pairing, in one line; None when it is fine."""
    from pydantic import ValidationError

    from streamrate.events import Matchup

    both = sorted(set(first) & set(second))
    if both:
        return f"an entity cannot be on both sides: {', '.join(both)}"
    if not first or not second:
        return "each side needs at least one id"
    try:
        Matchup(first=first, second=second, context=ctx)
    except ValidationError as exc:
        return "; ".join(
            f"{'.'.join(str(p) for p in e['loc']) or 'pairing'}: "
            f"{e['msg'].removeprefix('Value error, ')}"
            for e in exc.errors(include_url=False)[:3]
        )
    return None


@app.command()
def ask(
    first: Annotated[str | None, typer.Argument(help="First side: ids joined by commas.")] = None,
    second: Annotated[str | None, typer.Argument(help="Second side: ids joined by commas.")] = None,
    lobby: Annotated[str | None, typer.Option(help="Lobby: ids joined by commas.")] = None,
    team_size: Annotated[
        str,
        typer.Option(
            "--team-size",
            metavar="N,N",
            help="Team sizes for --lobby, e.g. 2,2 (default: an even split).",
        ),
    ] = "",
    teams: Annotated[str, typer.Option("--teams", hidden=True)] = "",  # the earlier spelling
    context: Annotated[
        list[str] | None, typer.Option(help="name=category or name:=number (repeatable).")
    ] = None,
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    space: SpaceOpt = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print the raw JSON reply.")] = False,
    strict: Annotated[
        bool, typer.Option("--strict", help="An id the model has never seen is an error.")
    ] = False,
    schema: Annotated[
        bool, typer.Option("--schema", help="Print the request JSON Schema.")
    ] = False,
    timeout_s: Annotated[float, typer.Option("--timeout", help="Seconds to wait.")] = 5.0,
) -> None:
    """Ask the running service: P(FIRST beats SECOND), or the most even split of a lobby.

    Exit codes: 0 answered, 1 the service replied with an error, 2 bad input, no
    service or no reply (and, with --strict, an id the model has never seen).
    """
    import redis as redis_lib

    from streamrate.client import ask as ask_service
    from streamrate.client import format_reply, never_seen, parse_context
    from streamrate.connect import RedisClients, explain
    from streamrate.errors import StreamrateError
    from streamrate.serve.queries import request_schema

    if schema:
        typer.echo(json.dumps(request_schema(), indent=2))
        return
    clients: RedisClients | None = None
    try:
        ctx = parse_context(context or [])
        if lobby is not None:
            ids = _side(lobby)
            sizes_text = team_size or teams
            try:
                sizes = [int(x) for x in sizes_text.split(",") if x.strip()]
            except ValueError:
                raise _fail(f"--team-size {sizes_text!r}: write two sizes, e.g. 2,2") from None
            if not sizes:
                if len(ids) % 2:
                    raise _fail(
                        f"a lobby of {len(ids)} cannot be split evenly: give --team-size, "
                        f"e.g. --team-size {len(ids) // 2},{len(ids) - len(ids) // 2}"
                    )
                sizes = [len(ids) // 2, len(ids) // 2]
            if len(sizes) != 2 or min(sizes) < 1 or sum(sizes) != len(ids):
                raise _fail(
                    f"--team-size {sizes_text}: two sizes of at least 1 adding up to the "
                    f"{len(ids)} ids of the lobby"
                )
            req: dict[str, Any] = {
                "kind": "lobby",
                "entities": ids,
                "team_sizes": sizes,
                "context": ctx,
            }
        elif first and second:
            a, b = _side(first), _side(second)
            problem = _pairing_problem(a, b, ctx)
            if problem is not None:
                raise _fail(problem)
            req = {"kind": "pairing", "first": a, "second": b, "context": ctx}
        else:
            raise _fail("give FIRST and SECOND (ids joined by commas), or --lobby")
        settings = _service_settings(config, redis_url, set_)
        keys = settings.keys(settings.space(space))
        clients = RedisClients(settings.redis)
        reply = ask_service(clients(), keys.requests, req, timeout_s)
    except (StreamrateError, redis_lib.RedisError, ValueError) as exc:
        typer.echo(f"error: {explain(exc, clients)}", err=True)
        raise typer.Exit(2) from exc
    typer.echo(json.dumps(reply, indent=2) if as_json else format_reply(reply))
    if not reply.get("ok"):
        raise typer.Exit(1)
    unknown = never_seen(reply)
    if strict and unknown:
        raise _fail(f"never seen: {', '.join(unknown)} (--strict)")


@app.command()
def watch(
    pairing: Annotated[
        list[str], typer.Argument(help="Pairings to watch: first,ids:second,ids (one or more).")
    ],
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    space: SpaceOpt = None,
    ttl_s: Annotated[
        float, typer.Option("--ttl", help="Seconds the service keeps the watch unless renewed.")
    ] = 60.0,
) -> None:
    """Follow fresh odds of PAIRING(s) as matches are applied, until Ctrl-C.

    The watch belongs to this command alone (its own watcher id and channel); it
    is renewed while the command runs and cleared when it ends.
    """
    import threading

    import redis as redis_lib

    from streamrate.client import watch as watch_service
    from streamrate.connect import RedisClients, explain
    from streamrate.errors import StreamrateError

    def show(msg: dict[str, Any]) -> None:
        typer.echo(
            f"{'+'.join(msg['first'])} vs {'+'.join(msg['second'])}: "
            f"{msg['p_first_wins']:.3f}  (after {msg['match_id']}, {msg['model_version']})"
        )

    make: RedisClients | None = None
    try:
        pairs = []
        for p in pairing:
            a, sep, b = p.partition(":")
            if not sep:
                raise _fail(f"{p!r}: write first,ids:second,ids")
            first, second = _side(a), _side(b)
            problem = _pairing_problem(first, second, {})
            if problem is not None:
                raise _fail(f"{p}: {problem}")
            pairs.append({"first": first, "second": second})
        settings = _service_settings(config, redis_url, set_)
        keys = settings.keys(settings.space(space))
        make = RedisClients(settings.redis)
        ready = threading.Event()
        stop = threading.Event()

        def started() -> None:
            ready.wait()
            typer.echo(f"watching {len(pairs)} pairing(s) (Ctrl-C to stop)", err=True)

        threading.Thread(target=started, daemon=True).start()
        watch_service(
            make(),
            keys.requests,
            pairs,
            show,
            stop,
            ttl_s=ttl_s,
            ready=ready,
        )
    except KeyboardInterrupt:
        return
    except (StreamrateError, redis_lib.RedisError) as exc:
        typer.echo(f"error: {explain(exc, make)}", err=True)
        raise typer.Exit(2) from exc


def _ask_and_print(
    req: dict[str, Any],
    config: Path | None,
    redis_url: str | None,
    set_: list[str] | None,
    space: str | None,
    as_json: bool,
    timeout_s: float,
) -> None:
    """Send one request the way `ask` does; print the reply; exit 1 on an error reply."""
    import redis as redis_lib

    from streamrate.client import ask as ask_service
    from streamrate.client import format_reply
    from streamrate.connect import RedisClients, explain
    from streamrate.errors import StreamrateError

    clients: RedisClients | None = None
    try:
        settings = _service_settings(config, redis_url, set_)
        keys = settings.keys(settings.space(space))
        clients = RedisClients(settings.redis)
        reply = ask_service(clients(), keys.requests, req, timeout_s)
    except (StreamrateError, redis_lib.RedisError) as exc:
        typer.echo(f"error: {explain(exc, clients)}", err=True)
        raise typer.Exit(2) from exc
    typer.echo(json.dumps(reply, indent=2) if as_json else format_reply(reply))
    if not reply.get("ok"):
        raise typer.Exit(1)


@app.command()
def promote(
    name: Annotated[str, typer.Argument(help="Label of the challenger member to answer.")],
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    space: SpaceOpt = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print the raw JSON reply.")] = False,
    timeout_s: Annotated[float, typer.Option("--timeout", help="Seconds to wait.")] = 5.0,
) -> None:
    """Make member NAME of a space's challenger set answer queries (no restart, no state lost)."""
    req = {"kind": "promote", "model": name}
    _ask_and_print(req, config, redis_url, set_, space, as_json, timeout_s)


@app.command()
def compare(
    reference: Annotated[
        str | None, typer.Option(help="Member the others are compared with (default: active).")
    ] = None,
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    space: SpaceOpt = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print the raw JSON reply.")] = False,
    timeout_s: Annotated[float, typer.Option("--timeout", help="Seconds to wait.")] = 10.0,
) -> None:
    """Side-by-side table of a challenger set's members over the recent events.

    Log loss (nats), Brier score, ECE (10 equal-width bins) and accuracy on the
    expected score; for every member but the reference a 95% paired circular block
    bootstrap interval of its mean log-loss difference to the reference.
    """
    req: dict[str, Any] = {"kind": "compare"}
    if reference is not None:
        req["reference"] = reference
    _ask_and_print(req, config, redis_url, set_, space, as_json, timeout_s)


@app.command("dead-letters")
def dead_letters(
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    space: SpaceOpt = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON lines.")] = False,
    limit: Annotated[int, typer.Option(help="Show at most this many, newest first.", min=1)] = 20,
    resend: Annotated[
        list[str] | None,
        typer.Option(help="Re-send this dead letter (its id) to the event stream (repeatable)."),
    ] = None,
    resend_all: Annotated[
        bool, typer.Option("--resend-all", help="Re-send every dead letter kept whole.")
    ] = False,
) -> None:
    """List a space's dead letters with their reasons, or re-send chosen ones after a fix.

    A re-sent entry gets a new stream id and leaves the dead letters; one whose
    payload was kept truncated is never re-sent. If it is still refused, the
    service sets it aside again.
    """
    import redis as redis_lib

    from streamrate.deadletters import list_dead
    from streamrate.deadletters import resend as resend_letters
    from streamrate.errors import StreamrateError
    from streamrate.service import redis_factory

    try:
        settings = _service_settings(config, redis_url, set_)
        sp = settings.space(space)
        keys = settings.keys(sp)
        client = redis_factory(settings.redis)()
        if resend or resend_all:
            report = resend_letters(client, keys.dead, keys.events, None if resend_all else resend)
            if as_json:
                typer.echo(json.dumps(report.__dict__))
            else:
                for old, new in report.resent.items():
                    typer.echo(f"{old} -> {new}")
                for sid in report.truncated:
                    typer.echo(f"{sid}: kept truncated, not re-sent", err=True)
                for sid in report.missing:
                    typer.echo(f"{sid}: no such dead letter", err=True)
                typer.echo(f"re-sent {len(report.resent)} entries to {keys.events}")
            if report.missing:
                raise typer.Exit(1)
            return
        letters = list_dead(client, keys.dead, limit)
        total = client.xlen(keys.dead)
    except (StreamrateError, redis_lib.RedisError) as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(2) from exc
    fname = sp.event_field.encode()
    for letter in letters:
        if as_json:
            typer.echo(json.dumps(letter.to_json(fname)))
        else:
            mark = " [truncated]" if letter.truncated else ""
            typer.echo(f"{letter.id}  {letter.reason}{mark}\n    {letter.excerpt(fname)}")
    if not as_json:
        typer.echo(f"{len(letters)} of {total} dead letters in {keys.dead}", err=True)


@app.command()
def demo(
    redis_url: RedisOpt = None,
    matches: Annotated[int, typer.Option(help="Matches the simulated world sends.")] = 6000,
    model: Annotated[str, typer.Option(help="Model the service runs.")] = "recalibrated",
    rate: Annotated[float, typer.Option(help="Events per second sent.")] = 1500.0,
    seed: Annotated[int, typer.Option(help="World seed.")] = 7,
) -> None:
    """Everything in one process: world -> stream -> service -> queries -> live feed."""
    from streamrate.demo import run_demo
    from streamrate.errors import StreamrateError

    try:
        run_demo(redis_url, matches=matches, rate_per_s=rate, model=model, seed=seed)
    except StreamrateError as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(2) from exc


@app.command()
def health(
    config: ConfigOpt = None,
    space: Annotated[
        str | None, typer.Option("--space", metavar="NAME", help="Only this model space.")
    ] = None,
    url: Annotated[
        str | None,
        typer.Option(
            metavar="URL",
            help="Metrics endpoint of a running service (default: the address in --config, "
            "else the default metrics address).",
        ),
    ] = None,
    checkpoint: Annotated[
        Path | None,
        typer.Option(
            metavar="FILE", help="Read this checkpoint file instead of a running service."
        ),
    ] = None,
    plot: Annotated[
        Path | None,
        typer.Option(
            metavar="PNG", help="Also write a PNG of each figure against its alert level."
        ),
    ] = None,
) -> None:
    """One-screen health report with a verdict per line (ok / watch / bad / n/a).

    The report and the overall verdict go to stdout. Exit code 0 when nothing is
    bad, 1 when a line is past its alert level, 2 when the source cannot be read.
    Thresholds are those of the Prometheus alert rules.
    """
    from streamrate.config import load_settings
    from streamrate.watch.health import (
        BAD,
        fetch_metrics,
        format_report,
        from_checkpoint,
        from_metrics_text,
        health_png,
        metrics_url,
        worst,
    )

    if checkpoint is not None:
        lines = from_checkpoint(checkpoint)
    else:
        settings = load_settings(config)
        if config is not None and url is None and not settings.metrics.enabled:
            raise _fail(
                f"metrics are off in {config} (metrics.enabled = false): turn them on, "
                "or read a checkpoint with --checkpoint"
            )
        address = url or metrics_url(settings.metrics)
        try:
            text = fetch_metrics(address)
        except StreamrateError as exc:
            where = f"metrics.port in {config}" if config else "metrics.port in its settings"
            raise _fail(
                f"{exc} (is the service running with metrics enabled? see {where})"
            ) from exc
        lines = from_metrics_text(text)
    if space is not None:
        lines = [x for x in lines if x.space == space]
        if not lines:
            raise _fail(f"nothing reported for model space {space!r}")
    typer.echo(format_report(lines))
    if plot is not None:
        health_png(plot, lines)
        typer.echo(f"wrote {plot}", err=True)
    verdict = worst(lines)
    typer.echo(f"overall: {verdict}")
    if verdict == BAD:
        raise typer.Exit(1)


@app.command()
def web(
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    space: SpaceOpt = None,
    bind: Annotated[str, typer.Option(help="Address to listen on (loopback by default).")] = (
        "127.0.0.1"
    ),
    port: Annotated[int, typer.Option(help="TCP port.")] = 8750,
    token: Annotated[
        str | None,
        typer.Option(
            envvar="STREAMRATE_WEB_TOKEN",
            help="Bearer token every request must carry (header, or ?token= in a page URL); "
            "required off loopback.",
        ),
    ] = None,
    cors_origin: Annotated[
        list[str] | None, typer.Option(help="Origin allowed to read the API (repeatable).")
    ] = None,
    metrics_url: Annotated[
        str | None,
        typer.Option(help="The service's metrics page (default: from the settings' [metrics])."),
    ] = None,
    watch: Annotated[
        list[str] | None,
        typer.Option(help="Pairing kept watched for the board: first,ids:second,ids (repeatable)."),
    ] = None,
    context: Annotated[
        list[str] | None,
        typer.Option(help="Context of the --watch pairings: name=category or name:=number."),
    ] = None,
    max_clients: Annotated[int, typer.Option(help="Most browser connections at once.")] = 1000,
) -> None:
    """Serve the broadcast overlay, the live board and their SSE feed over HTTP (read-only)."""
    from pydantic import ValidationError

    from streamrate.client import parse_context
    from streamrate.config import WebSettings, metrics_url_of
    from streamrate.errors import StreamrateError
    from streamrate.web.app import parse_pairing
    from streamrate.web.server import WebServer

    try:
        settings = _service_settings(config, redis_url, set_)
        ctx = parse_context(context or [])
        pinned = [parse_pairing(w, ctx) for w in watch or []]
        web_settings = WebSettings(
            bind=bind,
            port=port,
            token=token,
            cors_origins=tuple(cors_origin or ()),
            metrics_url=metrics_url or metrics_url_of(settings.metrics),
            max_clients=max_clients,
        )
        server = WebServer(web_settings, settings, space, pinned)
    except ValidationError as exc:
        first = exc.errors(include_url=False)[0]
        where = ".".join(str(p) for p in first["loc"])
        typer.echo(f"error: {where + ': ' if where else ''}{first['msg']}", err=True)
        raise typer.Exit(2) from exc
    except (StreamrateError, ValueError) as exc:
        typer.echo(f"error: {exc}", err=True)
        raise typer.Exit(2) from exc
    shown = "localhost" if bind in ("127.0.0.1", "::1") else bind
    typer.echo(f"board:   http://{shown}:{port}/board", err=True)
    typer.echo(f"overlay: http://{shown}:{port}/overlay?p=FIRST:SECOND", err=True)
    server.run()


@app.command("checkpoint-backup")
def checkpoint_backup(
    out: Annotated[Path, typer.Argument(help="File to write the checkpoint to.")],
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    space: SpaceOpt = None,
) -> None:
    """Copy the newest checkpoint of a space (file or Redis key) out to a file."""
    import redis as redis_lib

    from streamrate.backup import backup
    from streamrate.errors import StreamrateError
    from streamrate.service import redis_factory

    try:
        settings = _service_settings(config, redis_url, set_)
        sp = settings.space(space)
        client = redis_factory(settings.redis)() if settings.checkpoint.store == "redis" else None
        info = backup(settings, sp, client, out)
    except (StreamrateError, redis_lib.RedisError, OSError) as exc:
        raise _fail(" ".join(str(exc).split())) from exc
    typer.echo(
        f"wrote {info.where}: {info.model}, {info.applied} events applied, "
        f"last stream id {info.last_id}, {info.size_bytes} bytes"
    )


@app.command("checkpoint-restore")
def checkpoint_restore(
    source: Annotated[Path, typer.Argument(help="A file written by checkpoint-backup.")],
    config: ConfigOpt = None,
    redis_url: RedisOpt = None,
    set_: SetOpt = None,
    space: SpaceOpt = None,
    force: Annotated[
        bool, typer.Option("--force", help="Install even while a writer of the space runs.")
    ] = False,
    idle_s: Annotated[
        float, typer.Option(help="A group member that read within this many seconds is running.")
    ] = 10.0,
) -> None:
    """Install a backed-up checkpoint as a space's, if it fits the settings.

    Refused when it holds another model, other settings or another format, and
    while the space's writer runs (unless --force). Moves the consumer group
    back to the checkpoint's last stream id, so later entries are read again.
    """
    import redis as redis_lib

    from streamrate.backup import restore
    from streamrate.errors import StreamrateError
    from streamrate.service import redis_factory

    try:
        settings = _service_settings(config, redis_url, set_)
        sp = settings.space(space)
        client = redis_factory(settings.redis)()
        info = restore(settings, sp, client, source, force=force, idle_s=idle_s)
    except (StreamrateError, redis_lib.RedisError) as exc:
        raise _fail(" ".join(str(exc).split())) from exc
    typer.echo(
        f"installed {info.where}: {info.model}, {info.applied} events applied, "
        f"last stream id {info.last_id}; the consumer group reads on from there"
    )
    if info.note:
        typer.echo(f"note: {info.note}", err=True)


@app.command()
def warm() -> None:
    """Compile every model kernel into the on-disk cache (run once, e.g. when building an image)."""
    import os

    from streamrate._kernel_cache import ENV
    from streamrate.warm import warm_kernels

    seconds = warm_kernels(say=lambda line: typer.echo(line, err=True))
    where = os.environ.get(ENV) or "numba's default cache folder"
    typer.echo(f"model kernels ready in {seconds:.1f} s (cache: {where})")


def main() -> None:  # pragma: no cover - console entry point
    app()
