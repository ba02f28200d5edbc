"""``stopwise fit DATA --model SPEC ...``: fit one model and print its summary table."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from stopwise._io import write_json
from stopwise.bayes_draws import result_record
from stopwise.commands import _args, _cluster, _options, _table
from stopwise.data_schemas.errors import StopwiseInputError


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "fit",
        help="fit a model to choice data (maximum likelihood or Bayes)",
        description="Fit one model (SPEC such as crra+planner+logit) to stopping or "
        "lottery-choice data and print a summary table: estimates, standard errors, 95% "
        "intervals, log-likelihood, AIC, BIC and convergence. Results are research "
        "estimates, not a basis for individual financial, clinical or hiring decisions. "
        "In level-k fits, level is the mean depth of a binomial mixture of depths 0-6, not "
        "one integer depth (fit an integer depth with --option level=K).",
    )
    _args.add_data(parser)
    parser.add_argument(
        "--model",
        action="append",
        required=True,
        metavar="SPEC",
        help="model spec, parts joined by '+', e.g. crra+planner+logit (give it once more "
        "per --joint file)",
    )
    parser.add_argument(
        "--joint",
        action="append",
        default=[],
        metavar="FILE",
        help="joint fit: FILE (e.g. a lottery list of the same subjects) is explained by the "
        "next --model and DATA by the first, in one likelihood with parameters shared by name "
        "(e.g. r); repeatable",
    )
    _options.add_option(parser)
    _args.add_method(parser, "Bayesian posterior sampling")
    parser.add_argument(
        "--by",
        choices=("subject",),
        default=None,
        help="one fit per subject (maximum likelihood only)",
    )
    _args.add_se(
        parser,
        ("hessian", "robust", "bootstrap", "none"),
        "standard errors: subject-clustered sandwich (default with "
        "several subjects), inverse Hessian, subject bootstrap, or none",
    )
    parser.add_argument(
        "--bootstrap-reps",
        type=_args.positive_int,
        default=200,
        metavar="B",
        help="bootstrap replications with --se bootstrap (default 200)",
    )
    parser.add_argument(
        "--formula",
        action="append",
        default=[],
        metavar="FORMULA",
        help="a parameter as a linear function of data columns on its "
        "unconstrained scale, e.g. 'r ~ 1 + treatment' (repeatable)",
    )
    parser.add_argument(
        "--fix",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="hold a parameter at a value (repeatable)",
    )
    parser.add_argument(
        "--starts",
        type=_args.positive_int,
        default=None,
        metavar="N",
        help="optimiser starts (default 3; 8 with --types)",
    )
    parser.add_argument(
        "--types",
        type=int,
        default=None,
        metavar="K",
        help="finite mixture: each subject belongs to one of K types (K >= 2) with their own "
        "parameters; reports the types' parameters, their shares and each subject's type "
        "probabilities (maximum likelihood, pooled)",
    )
    parser.add_argument(
        "--profile",
        action="append",
        default=[],
        metavar="NAME",
        help="also report the 95%% profile-likelihood interval of parameter NAME "
        "(repeatable; pooled maximum likelihood only)",
    )
    _args.add_max_target(parser, _args.FIT_CAP_HELP)
    _args.add_wealth(parser)
    _args.add_hierarchical(parser)
    _args.add_sampler(parser)
    _args.add_seed(parser, "random seed (starts, bootstrap, sampler)")
    parser.add_argument("--no-progress", action="store_true", help="hide progress bars")
    _cluster.add_cluster_options(parser)  # Parquet parts and bootstrap chunks, one task each
    _args.add_json_file(parser)
    _table.add_table_option(parser)
    parser.set_defaults(func=run)
    return parser


def parse_fixed(items: list[str]) -> dict[str, float]:
    """NAME=VALUE pairs -> dict; a malformed pair is a usage error."""
    out: dict[str, float] = {}
    for item in items:
        name, sep, value = item.partition("=")
        try:
            if not sep or not name.strip():
                raise ValueError
            out[name.strip()] = float(value)
        except ValueError:
            raise StopwiseInputError(
                f"--fix {item!r}: expected NAME=VALUE with a number, e.g. --fix r=0.5"
            ) from None
    return out


def add_profiles(result: Any, names: list[str]) -> None:
    """Append each named parameter's profile-likelihood interval to the fit's notes."""
    if names and not hasattr(result, "profile"):
        raise StopwiseInputError("--profile applies to pooled maximum-likelihood fits")
    for name in names:
        if name not in result.table.names:
            raise StopwiseInputError(
                f"--profile {name}: no such parameter; the fit reports "
                f"{', '.join(result.table.names)}"
            )
        low, high = result.profile(name)
        result.notes.append(f"95% profile-likelihood interval for {name}: [{low:.6g}, {high:.6g}]")


def emit(result: Any, json_path: str | None) -> None:
    """Summary to stdout (stderr when the JSON goes to stdout); JSON written atomically."""
    text = result.summary() if hasattr(result, "summary") else str(result)
    print(text, file=sys.stderr if json_path == "-" else sys.stdout)
    if json_path:
        write_json(json_path, result_record(result))  # Bayes: plus thinned draws


def option_note(items: list[str]) -> list[str]:
    """The model options of the command line, stated in the result's notes."""
    return [f"model options: {', '.join(items)}"] if items else []


def run_joint(args: argparse.Namespace) -> Any:
    """``--joint``: DATA with the first --model, each --joint file with the next one."""
    from stopwise.joint import fit_joint

    if len(args.model) != len(args.joint) + 1:
        raise StopwiseInputError(
            f"--joint: give one --model for DATA and one per --joint file ({len(args.joint) + 1} "
            f"in all); got {len(args.model)}"
        )
    if args.method != "mle" or args.by or args.types is not None or args.formula:
        raise StopwiseInputError(
            "--joint fits by maximum likelihood, pooled: no --method bayes, --by, --types or "
            "--formula"
        )
    models = [_args.model_from_args(m, args) for m in args.model]
    kw: dict[str, Any] = {"fixed": parse_fixed(args.fix)} if args.fix else {}
    return fit_joint(
        list(zip(models, [args.data, *args.joint])),
        se=_args.se_choice(args.se),
        starts=3 if args.starts is None else args.starts,
        seed=args.seed,
        bootstrap_reps=args.bootstrap_reps,
        progress=not args.no_progress,
        **kw,
    )


def run(args: argparse.Namespace) -> int:
    from stopwise.api import fit

    _table.check_table_path(args.table)
    if args.joint:
        result = run_joint(args)
        result.notes += option_note(args.options)
        add_profiles(result, args.profile)
        emit(result, args.json)
        _table.write_paper_table(args.table, result, args.table_interval)
        return 0
    if len(args.model) > 1:
        raise StopwiseInputError(
            "fit takes one --model (compare several with `stopwise compare`; fit several data "
            "sets jointly with --joint FILE)"
        )
    model = _args.model_from_args(args.model[0], args)
    se = _args.se_choice(args.se)
    if args.method == "bayes":
        if args.by or args.se or args.fix or args.types is not None:
            raise StopwiseInputError("--by, --se, --fix and --types apply to --method mle only")
        result = fit(
            model,
            args.data,
            method="bayes",
            max_target=args.max_target,
            seed=args.seed,
            hierarchical=args.hierarchical,
            parametrisation=args.parametrisation,
            planner_cap=args.planner_cap,
            loo=args.loo,
            chains=args.chains,
            draws=args.draws,
            warmup=args.warmup,
            progress=not args.no_progress,
            formulas=args.formula or None,
        )
    else:
        bayes_only = args.parametrisation != "auto" or args.planner_cap != "auto" or args.loo
        if args.hierarchical or bayes_only:
            raise StopwiseInputError(
                "--hierarchical, --parametrisation, --planner-cap and --loo apply to --method bayes"
            )
        kw: dict[str, Any] = _cluster.cluster_kwargs(args)  # Parquet parts, bootstrap chunks
        if args.fix:
            kw["fixed"] = parse_fixed(args.fix)
        if args.types is not None:
            kw["types"] = args.types
        if args.by is None:
            kw.update(bootstrap_reps=args.bootstrap_reps, progress=not args.no_progress)
            if args.starts is not None:
                kw["starts"] = args.starts
            elif args.types is None:
                kw["starts"] = 3
        result = fit(
            model,
            args.data,
            se=se,
            by=args.by,
            formulas=args.formula or None,
            max_target=args.max_target,
            seed=args.seed,
            **kw,
        )
        add_profiles(result, args.profile)
    if isinstance(getattr(result, "notes", None), list):
        result.notes += option_note(args.options)
    emit(result, args.json)
    _table.write_paper_table(args.table, result, args.table_interval)
    return 0
