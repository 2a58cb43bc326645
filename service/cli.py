"""``choicecast``: the ops command (publish, validate, inspect, route, compare, calibrate...).

It uses the store library directly and never needs the service running. Output is a readable
table on stdout (``--json`` for machines where useful); errors go to stderr naming the field,
with exit status 2 for bad input and 1 for a failure (store unreachable, corrupt artifact,
a routing change that lost a race).
"""

from __future__ import annotations

import argparse
import getpass
import json
import math
import os
import socket
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from model_store import (
    KEEP_SHADOW,
    ArtifactError,
    NotFound,
    RoutingConflict,
    RoutingError,
    RoutingState,
    Store,
    StoreError,
    StoreUnavailable,
    VersionExists,
    default_store_uri,
    open_store,
)
from model_store.inputs import read_model_inputs
from service.choice.spec import Coefficients, ModelSpec, SpecError, Term, validate_model

BAD_INPUT, FAILURE = 2, 1


class UserError(Exception):
    """Bad input on the command line (exit status 2)."""


# ---------------------------------------------------------------------------------------
# Output helpers


def table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """A plain aligned text table (numbers right-aligned)."""
    cells = [[_cell(v) for v in row] for row in rows]
    widths = [max([len(h), *(len(r[i]) for r in cells)]) for i, h in enumerate(headers)]
    numeric = [
        all(isinstance(row[i], int | float) and not isinstance(row[i], bool) for row in rows)
        and bool(rows)
        for i in range(len(headers))
    ]

    def line(values: Sequence[str]) -> str:
        parts = [
            v.rjust(w) if num else v.ljust(w)
            for v, w, num in zip(values, widths, numeric, strict=True)
        ]
        return "  ".join(parts).rstrip()

    out = [line(headers), line(["-" * w for w in widths])]
    out += [line(r) for r in cells]
    return "\n".join(out)


def _cell(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if math.isnan(value):
            return "-"
        return f"{value:.6g}"
    return str(value)


def emit_json(data: Any) -> None:
    print(json.dumps(data, indent=2, sort_keys=False, default=_json_default))


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def operator(explicit: str | None) -> str:
    """Who makes a change: --by, else $CHOICECAST_OPERATOR, else user@host."""
    if explicit:
        return explicit
    env = os.environ.get("CHOICECAST_OPERATOR")
    if env:
        return env
    try:
        user = getpass.getuser()
    except (KeyError, OSError):
        user = "unknown"
    return f"{user}@{socket.gethostname()}"


def term_text(term: Term) -> str:
    parts = [term.coefficient]
    if term.attribute is not None:
        x = (
            term.attribute
            if term.transform == "identity"
            else f"{term.transform}({term.attribute})"
        )
        parts.append(x)
    if term.context is not None:
        parts.append(term.context)
    return " * ".join(parts)


def utility_text(spec: ModelSpec, alternative: str) -> str:
    terms = spec.utilities.get(alternative, ())
    return " + ".join(term_text(t) for t in terms) if terms else "0"


def range_text(low: float | None, high: float | None) -> str:
    if low is None and high is None:
        return "-"
    return f"[{'-inf' if low is None else f'{low:g}'}, {'inf' if high is None else f'{high:g}'}]"


def model_report(
    spec: ModelSpec, coefficients: Coefficients, estimation: dict[str, Any] | None = None
) -> str:
    """The readable description of a model version: structure, coefficients, nests."""
    out = [f"model {spec.name}  (family {spec.family}, range policy {spec.range_policy})", ""]
    out.append("alternatives")
    out.append(
        table(
            ["id", "label", "outside", "utility"],
            [[a.id, a.label, a.outside, utility_text(spec, a.id)] for a in spec.alternatives],
        )
    )
    for title, variables in (("attributes", spec.attributes), ("context", spec.context)):
        if variables:
            out += ["", title]
            out.append(
                table(
                    ["name", "unit", "estimation range", "role"],
                    [[v.name, v.unit, range_text(v.low, v.high), v.role] for v in variables],
                )
            )
    est = coefficients.estimates
    se = coefficients.std_errors
    rows = []
    for i, name in enumerate(coefficients.names):
        s = float(se[i]) if se is not None else math.nan
        t = float(est[i]) / s if s and math.isfinite(s) and s > 0 else math.nan
        rows.append([name, float(est[i]), s, t])
    out += ["", "coefficients", table(["name", "estimate", "std error", "t"], rows)]
    if spec.nests:
        values = coefficients.as_mapping()
        out += ["", "nests"]
        out.append(
            table(
                ["id", "scale", "value", "alternatives"],
                [
                    [n.id, n.scale, values.get(n.scale), ", ".join(n.alternatives)]
                    for n in spec.nests
                ],
            )
        )
    if coefficients.covariance is not None:
        eig = np.linalg.eigvalsh(coefficients.covariance)
        k = len(coefficients.names)
        out += ["", f"covariance  {k} x {k}, smallest eigenvalue {eig.min():.3g}"]
    else:
        out += ["", "covariance  none (no standard errors of probabilities)"]
    if estimation:
        out += ["", "estimation  " + ", ".join(f"{k} {v}" for k, v in estimation.items())]
    return "\n".join(out)


# ---------------------------------------------------------------------------------------
# Commands


def _store(args: argparse.Namespace) -> Store:
    return open_store(args.store, endpoint_url=args.s3_endpoint)


def cmd_validate(args: argparse.Namespace) -> int:
    try:
        spec, coefficients, estimation = read_model_inputs(
            args.spec, args.coefficients, args.covariance
        )
        validate_model(spec, coefficients)
    except SpecError as exc:
        if not args.json:
            raise
        emit_json({"valid": False, "problems": [p.as_dict() for p in exc.problems]})
        return BAD_INPUT
    if args.json:
        emit_json({"valid": True, "model": spec.name, "family": spec.family})
    else:
        print(model_report(spec, coefficients, estimation))
        print("\nvalid: nothing was written")
    return 0


def cmd_publish(args: argparse.Namespace) -> int:
    spec, coefficients, estimation = read_model_inputs(
        args.spec, args.coefficients, args.covariance
    )
    model = args.model or spec.name
    store = _store(args)
    manifest = store.publish(
        model,
        args.version,
        spec,
        coefficients,
        published_by=operator(args.by),
        estimation=estimation,
        parent=args.parent,
    )
    if args.json:
        emit_json(manifest)
    else:
        print(f"published {model} {args.version} to {store.uri}")
        for name, digest in manifest["files"].items():
            print(f"  {name}  sha256 {digest}")
        print("not routed yet: see `choicecast route`")
    return 0


def cmd_list(args: argparse.Namespace) -> int:
    store = _store(args)
    rows = []
    for model in store.list_models():
        state = store.get_routing(model)
        rows.append(
            [
                model,
                len(store.list_versions(model)),
                _live_text(state),
                state.shadow,
                state.generation,
            ]
        )
    if args.json:
        emit_json(
            [
                dict(zip(["model", "versions", "live", "shadow", "generation"], r, strict=True))
                for r in rows
            ]
        )
    elif rows:
        print(table(["model", "versions", "live", "shadow", "generation"], rows))
    else:
        print(f"no models in {store.uri} (try `choicecast demo`)")
    return 0


def _live_text(state: RoutingState) -> str:
    shares = state.shares()
    return ", ".join(f"{v} {100 * s:.4g}%" for v, s in shares.items()) if shares else "-"


def cmd_versions(args: argparse.Namespace) -> int:
    store = _store(args)
    versions = store.list_versions(args.model)
    if not versions:
        raise NotFound(f"model {args.model!r} not found in {store.uri}")
    state = store.get_routing(args.model)
    shares = state.shares()
    rows = []
    for version in versions:
        manifest = store.read_manifest(args.model, version)
        role = []
        if version in shares:
            role.append(f"live {100 * shares[version]:.4g}%")
        if version == state.shadow:
            role.append("shadow")
        rows.append(
            [
                version,
                manifest["created_at"],
                manifest["published_by"],
                manifest.get("parent"),
                ", ".join(role) or None,
            ]
        )
    if args.json:
        keys = ["version", "created_at", "published_by", "parent", "routing"]
        emit_json([dict(zip(keys, r, strict=True)) for r in rows])
    else:
        print(table(["version", "created", "published by", "parent", "routing"], rows))
        print(f"\nrouting generation {state.generation}")
    return 0


def cmd_show(args: argparse.Namespace) -> int:
    store = _store(args)
    if args.version is None:
        state = store.get_routing(args.model)
        versions = store.list_versions(args.model)
        if not versions:
            raise NotFound(f"model {args.model!r} not found in {store.uri}")
        if args.json:
            emit_json({"model": args.model, "versions": versions, "routing": state.as_dict()})
            return 0
        print(f"model {args.model}: {len(versions)} versions ({', '.join(versions)})")
        print(f"routing generation {state.generation}")
        print(f"  live    {_live_text(state)}")
        print(f"  shadow  {state.shadow or '-'}")
        if state.generation:
            print(f"  last change {state.changed_at} by {state.changed_by}: {state.reason}")
        latest = state.versions()[0] if state.versions() else versions[-1]
        loaded = store.load_version(args.model, latest)
        print(f"\n{latest} ({'live' if latest in state.live else 'latest'}):\n")
        print(model_report(loaded.spec, loaded.coefficients, loaded.manifest.get("estimation")))
        return 0
    loaded = store.load_version(args.model, args.version)
    manifest = loaded.manifest
    if args.json:
        emit_json(
            {
                "manifest": manifest,
                "coefficients": {
                    "names": list(loaded.coefficients.names),
                    "estimates": loaded.coefficients.estimates,
                    "std_errors": loaded.coefficients.std_errors,
                    "covariance": loaded.coefficients.covariance,
                },
            }
        )
        return 0
    print(f"{args.model} {args.version}  verified (format {manifest['format_version']})")
    print(f"  created {manifest['created_at']} by {manifest['published_by']}")
    print(f"  parent  {manifest.get('parent') or '-'}")
    for name, digest in manifest["files"].items():
        print(f"  {name}  sha256 {digest}")
    calibration = manifest.get("calibration")
    if calibration:
        targets = ", ".join(f"{k} {v:g}" for k, v in calibration.get("targets", {}).items())
        print(f"  calibrated to {targets} (gap {calibration.get('final_gap'):.3g})")
    print()
    print(model_report(loaded.spec, loaded.coefficients, manifest.get("estimation")))
    return 0


def parse_live(items: Sequence[str]) -> dict[str, float]:
    live: dict[str, float] = {}
    for item in items:
        version, eq, weight = item.partition("=")
        if not eq or not version:
            raise UserError(f"--live: {item!r} must be VERSION=WEIGHT")
        try:
            value = float(weight)
        except ValueError:
            raise UserError(f"--live {version}: weight {weight!r} is not a number") from None
        if version in live:
            raise UserError(f"--live: version {version!r} given twice")
        live[version] = value
    return live


def _state_text(state: RoutingState) -> str:
    """``v1 90%, v2 10%, shadow v2``: a routing state on one line."""
    if state.is_empty:
        return "nothing routed"
    return f"{_live_text(state)}, " + (f"shadow {state.shadow}" if state.shadow else "no shadow")


def _print_change(store: Store, state: RoutingState, headline: str, as_json: bool) -> None:
    """The new state and the one it replaced (read back: records are immutable), so a change
    made meanwhile by someone else is never replaced unseen."""
    replaced = store.get_routing(state.model, state.generation - 1)
    if as_json:
        emit_json({**state.as_dict(), "replaced": replaced.as_dict()})
        return
    print(f"{headline}: generation {state.generation}")
    print(
        f"  replaced generation {replaced.generation} ({_state_text(replaced)}) "
        f"with generation {state.generation} ({_state_text(state)})"
    )
    if replaced.generation:
        print(
            f"  generation {replaced.generation} was recorded by {replaced.changed_by} "
            f"at {replaced.changed_at}: {replaced.reason}"
        )
    print(f"  generation {state.generation} by {state.changed_by}: {state.reason}")


def cmd_route(args: argparse.Namespace) -> int:
    store = _store(args)
    state = store.change_routing(
        args.model,
        parse_live(args.live),
        args.shadow,
        reason=args.reason,
        changed_by=operator(args.by),
        expected_generation=args.expect_generation,
    )
    _print_change(store, state, f"routed {state.model}", args.json)
    return 0


def cmd_promote(args: argparse.Namespace) -> int:
    store = _store(args)
    state = store.promote(
        args.model,
        args.version,
        changed_by=operator(args.by),
        reason=args.reason,
        expected_generation=args.expect_generation,
    )
    _print_change(store, state, f"promoted {state.model} {args.version}", args.json)
    return 0


def cmd_rollback(args: argparse.Namespace) -> int:
    store = _store(args)
    state = store.rollback(
        args.model,
        changed_by=operator(args.by),
        reason=args.reason,
        expected_generation=args.expect_generation,
    )
    headline = f"rolled {state.model} back to the state of generation {state.restored_generation}"
    _print_change(store, state, headline, args.json)
    return 0


def cmd_history(args: argparse.Namespace) -> int:
    store = _store(args)
    if not store.list_versions(args.model):
        raise NotFound(f"model {args.model!r} not found in {store.uri}")
    history = store.history(args.model)
    if args.json:
        emit_json([s.as_dict() for s in history])
        return 0
    if not history:
        print(f"{args.model} has never been routed")
        return 0
    rows = [
        [s.generation, s.changed_at, s.changed_by, s.action, _live_text(s), s.shadow, s.reason]
        for s in history
    ]
    print(table(["gen", "when", "who", "action", "live", "shadow", "why"], rows))
    return 0


def _population(path: str):
    from service.codecs.long_table import read_table

    try:
        return read_table(path)
    except ValueError as exc:
        raise UserError(str(exc)) from None


def cmd_compare(args: argparse.Namespace) -> int:
    from model_store.compare import compare_versions

    store = _store(args)
    a = store.load_version(args.model, args.v1)
    b = store.load_version(args.model, args.v2)
    try:
        result = compare_versions(a, b, _population(args.population))
    except ValueError as exc:
        if getattr(exc, "problems", None):
            raise  # SpecError / ScoringError: listed problem by problem
        raise UserError(str(exc)) from None
    names = (args.v1, args.v2)
    if args.json:
        emit_json({"model": args.model, "versions": list(names), **result.as_dict(names)})
        return 0
    print(
        f"{args.model}: {args.v1} vs {args.v2} on {result.situations} situations ({args.population})"
    )
    s1, s2 = result.shares
    rows = [
        [
            alt,
            float(s1[j]),
            float(s2[j]),
            float(s2[j] - s1[j]),
            float(result.max_abs_dp_by_alternative[j]),
        ]
        for j, alt in enumerate(result.alternatives)
    ]
    print()
    print(
        table(["alternative", f"share {args.v1}", f"share {args.v2}", "change", "max |dP|"], rows)
    )
    if result.cost_elasticities is not None:
        e1, e2 = result.cost_elasticities
        print(f"\naggregate own elasticity with respect to {result.cost_attribute}")
        rows = [
            [alt, float(e1[j, j]), float(e2[j, j]), float(e2[j, j] - e1[j, j])]
            for j, alt in enumerate(result.alternatives)
        ]
        print(table(["alternative", args.v1, args.v2, "change"], rows))
    else:
        print("\nno common cost attribute: cost elasticities not compared")
    print(f"\nmax |dP| {result.max_abs_dp:.4g}   mean |dP| {result.mean_abs_dp:.4g}")
    w1, w2 = result.warnings
    if w1 or w2:
        print(f"values outside the estimation range: {w1} ({args.v1}), {w2} ({args.v2})")
    return 0


def parse_targets(text: str) -> dict[str, float]:
    """``alt=share,alt=share`` or the path of a JSON object {alt: share}."""
    path = Path(text)
    if path.suffix.lower() == ".json" or path.is_file():
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise UserError(f"--targets: cannot read {text!r}: {exc}") from None
        if not isinstance(data, dict):
            raise UserError("--targets: the JSON file must hold an object {alternative: share}")
        return data
    targets: dict[str, float] = {}
    for item in text.split(","):
        alt, eq, value = item.strip().partition("=")
        if not eq or not alt:
            raise UserError(f"--targets: {item!r} must be ALTERNATIVE=SHARE")
        try:
            targets[alt] = float(value)
        except ValueError:
            raise UserError(f"--targets {alt}: {value!r} is not a number") from None
    return targets


def cmd_calibrate(args: argparse.Namespace) -> int:
    from model_store.artifact import sha256
    from model_store.calibrate import calibrate

    store = _store(args)
    loaded = store.load_version(args.model, args.version)
    if args.new_version in store.list_versions(args.model):
        raise VersionExists(
            f"version {args.new_version!r} of model {args.model!r} is already published"
        )
    table_ = _population(args.population)
    result = calibrate(
        loaded,
        table_,
        parse_targets(args.targets),
        reference=args.reference,
        tolerance=args.tolerance,
        max_iterations=args.max_iterations,
    )
    status = "converged" if result.converged else "did NOT converge"
    print(f"{status} after {result.iterations} iterations; final max share gap {result.gap:.3g}")
    print(f"reference alternative {result.reference} (its constant held fixed)")
    rows = [
        [
            alt,
            result.targets[alt],
            result.shares[alt],
            result.constants.get(alt),
            result.adjustments.get(result.constants.get(alt, ""), None),
        ]
        for alt in loaded.spec.alternative_ids
    ]
    print(table(["alternative", "target", "predicted", "constant", "change"], rows))
    if not result.converged:
        print("nothing published: raise --max-iterations or check the targets", file=sys.stderr)
        return FAILURE
    population_bytes = Path(args.population).read_bytes()
    calibration = {
        "targets": result.targets,
        "reference": result.reference,
        "population": {"file": Path(args.population).name, "sha256": sha256(population_bytes)},
        "iterations": result.iterations,
        "final_gap": result.gap,
        "adjusted": result.adjustments,
        "note": "constants calibrated; standard errors and covariance carried over from the parent",
    }
    store.publish(
        args.model,
        args.new_version,
        loaded.spec,
        result.coefficients,
        published_by=operator(args.by),
        estimation=loaded.manifest.get("estimation"),
        parent=args.version,
        calibration=calibration,
    )
    print(f"\npublished {args.model} {args.new_version} (parent {args.version}); not routed yet")
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from model_store.demo import seed_store

    store = _store(args)
    rows = [[what, outcome] for what, outcome in seed_store(store, Path(args.populations))]
    print(f"demo store {store.uri}")
    print(table(["item", "outcome"], rows))
    print("\ntry: choicecast list; choicecast show wrenmouth_commute")
    return 0


def cmd_score_file(args: argparse.Namespace) -> int:
    import pyarrow as pa
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    from model_store.population import score_population
    from service.choice import ScoreOptions

    store = _store(args)
    version = args.version
    if version is None:
        state = store.get_routing(args.model)
        shares = state.shares()
        if not shares:
            raise UserError(f"--version: {args.model!r} is not routed; name a version")
        version = max(shares, key=lambda v: shares[v])
    loaded = store.load_version(args.model, version)
    scored = score_population(loaded, _population(args.population), ScoreOptions())
    p = scored.result.probabilities
    assert p is not None and scored.result.logsum is not None
    columns: dict[str, Any] = {"situation": scored.ids}
    for j, alt in enumerate(scored.model.alternatives):
        columns[f"p_{alt}"] = pa.array(p[:, j])
    columns["logsum"] = pa.array(scored.result.logsum)
    out = pa.table(columns)
    target = Path(args.out)
    if target.suffix.lower() in (".parquet", ".pq"):
        pq.write_table(out, target)
    else:
        pcsv.write_csv(out, target)
    print(f"scored {scored.batch.size} situations with {args.model} {version} -> {target}")
    if scored.warnings:
        print(f"{scored.warnings} values outside the estimation range")
    return 0


def cmd_serve(args: argparse.Namespace) -> int:
    from service.api.server import run

    run(
        args.store,
        host=args.host,
        port=args.port,
        workers=args.workers,
        s3_endpoint=args.s3_endpoint,
        poll_seconds=args.poll_seconds,
        tokens_file=args.tokens_file,
        log_level=args.log_level,
    )
    return 0


# ---------------------------------------------------------------------------------------
# Parser


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="choicecast",
        description="Ops tooling for choicecast: publish, inspect, route and compare model versions.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    store = argparse.ArgumentParser(add_help=False)
    store.add_argument(
        "--store",
        default=None,
        help=f"store URI: a directory, file://..., or s3://bucket/prefix "
        f"(default $CHOICECAST_STORE, else ./var/store; now {default_store_uri()})",
    )
    store.add_argument(
        "--s3-endpoint", default=None, help="S3-compatible endpoint URL ($CHOICECAST_S3_ENDPOINT)"
    )
    machine = argparse.ArgumentParser(add_help=False)
    machine.add_argument("--json", action="store_true", help="machine-readable output")
    who = argparse.ArgumentParser(add_help=False)
    who.add_argument(
        "--by", help="who makes the change (default $CHOICECAST_OPERATOR, else user@host)"
    )
    guard = argparse.ArgumentParser(add_help=False)
    guard.add_argument(
        "--expect-generation",
        type=int,
        default=None,
        help="refuse unless the routing is still at this generation (what you reviewed; "
        "recommended in scripts)",
    )
    inputs = argparse.ArgumentParser(add_help=False)
    inputs.add_argument("spec", help="SPEC.json: the model specification (+ optional estimation)")
    inputs.add_argument("--coefficients", required=True, help="CSV or JSON coefficients")
    inputs.add_argument("--covariance", help="CSV or JSON covariance matrix")

    def add(name: str, func: Callable[[argparse.Namespace], int], help: str, parents=()):
        p = sub.add_parser(name, help=help, description=help, parents=list(parents))
        p.set_defaults(func=func)
        return p

    add("validate", cmd_validate, "check a spec and coefficients; write nothing", [inputs, machine])
    p = add("publish", cmd_publish, "write a new immutable version", [inputs, store, who, machine])
    p.add_argument("--model", help="model name (default: the spec's name, which must match)")
    p.add_argument("--version", required=True, help="the new version id (never reused)")
    p.add_argument("--parent", help="the version this one derives from")
    add("list", cmd_list, "models, their versions and routing", [store, machine])
    p = add("versions", cmd_versions, "versions of a model", [store, machine])
    p.add_argument("model")
    p = add("show", cmd_show, "a model's routing, or one version in detail", [store, machine])
    p.add_argument("model")
    p.add_argument("version", nargs="?")
    p = add(
        "route", cmd_route, "set live weights (canary) and the shadow", [store, who, guard, machine]
    )
    p.add_argument("model")
    p.add_argument("--live", nargs="+", required=True, metavar="VERSION=WEIGHT")
    shadow = p.add_mutually_exclusive_group()
    shadow.add_argument(
        "--shadow",
        default=KEEP_SHADOW,
        metavar="VERSION",
        help="a version scored alongside, never answering (default: keep the current shadow, "
        "unless it becomes the only live version)",
    )
    shadow.add_argument(
        "--no-shadow",
        dest="shadow",
        action="store_const",
        const=None,
        default=KEEP_SHADOW,
        help="stop shadow scoring",
    )
    p.add_argument("--reason", required=True, help="why (recorded in the history)")
    p = add(
        "promote", cmd_promote, "route 100%% of traffic to a version", [store, who, guard, machine]
    )
    p.add_argument("model")
    p.add_argument("version")
    p.add_argument("--reason")
    p = add(
        "rollback",
        cmd_rollback,
        "restore the routing before the current one",
        [store, who, guard, machine],
    )
    p.add_argument("model")
    p.add_argument("--reason")
    p = add("history", cmd_history, "every routing change: who, when, what, why", [store, machine])
    p.add_argument("model")
    p = add(
        "compare", cmd_compare, "score two versions on a population side by side", [store, machine]
    )
    p.add_argument("model")
    p.add_argument("v1")
    p.add_argument("v2")
    p.add_argument("--population", required=True, help="long table, Parquet or CSV")
    p = add(
        "calibrate",
        cmd_calibrate,
        "fit the constants to target shares and publish the result as a new version",
        [store, who],
    )
    p.add_argument("model")
    p.add_argument("version")
    p.add_argument("--targets", required=True, help="ALT=SHARE,... or a JSON file {alt: share}")
    p.add_argument("--population", required=True, help="long table, Parquet or CSV")
    p.add_argument("--new-version", required=True)
    p.add_argument(
        "--reference", help="alternative whose constant stays fixed (default: the outside option)"
    )
    p.add_argument("--tolerance", type=float, default=1e-6, help="max share gap (default 1e-6)")
    p.add_argument("--max-iterations", type=int, default=500)
    p = add("score-file", cmd_score_file, "score a population file to Parquet or CSV", [store])
    p.add_argument("model")
    p.add_argument("--population", required=True)
    p.add_argument("--out", required=True, help="output file (.parquet or .csv)")
    p.add_argument("--version", help="default: the live version with the largest weight")
    p = add("demo", cmd_demo, "seed a store with invented demo models (idempotent)", [store])
    p.add_argument(
        "--populations", default="./var/populations", help="where to write the populations"
    )
    p = add("serve", cmd_serve, "run the HTTP service under gunicorn", [store])
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8000)
    p.add_argument("--workers", type=int, default=2)
    p.add_argument("--poll-seconds", type=float, default=None, help="routing poll interval")
    p.add_argument("--tokens-file", default=None, help="file of API tokens")
    p.add_argument("--log-level", default=None)
    return parser


def _error(message: str) -> None:
    print(f"choicecast: error: {message}", file=sys.stderr)


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return args.func(args)
    except SpecError as exc:
        _error("invalid input")
        for problem in exc.problems:
            print(f"  {problem.path}: {problem.message}", file=sys.stderr)
        return BAD_INPUT
    except (UserError, NotFound, VersionExists) as exc:
        _error(str(exc))
        return BAD_INPUT
    except RoutingConflict as exc:
        _error(str(exc))
        return FAILURE
    except RoutingError as exc:
        _error(str(exc))
        return BAD_INPUT
    except (ArtifactError, StoreUnavailable) as exc:
        _error(str(exc))
        return FAILURE
    except StoreError as exc:
        _error(str(exc))
        return BAD_INPUT
    except ValueError as exc:  # ScoringError and other refusals of values
        problems = getattr(exc, "problems", None)
        if problems:
            _error("invalid input")
            for problem in problems:
                print(f"  {problem.path}: {problem.message}", file=sys.stderr)
        else:
            _error(str(exc))
        return BAD_INPUT
    except KeyboardInterrupt:
        _error("interrupted")
        return 130
    except BrokenPipeError:  # the reader went away (e.g. `| head`): stop quietly
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0


if __name__ == "__main__":
    sys.exit(main())
