"""``stopwise compare DATA --model SPEC --model SPEC ...``: fit several models, compare."""

from __future__ import annotations

import argparse
from typing import Any

from stopwise.commands import _args, _cluster, _options, _table
from stopwise.commands.fit import emit, option_note
from stopwise.data_schemas.errors import StopwiseInputError


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "compare",
        help="fit several models to the same data and compare them",
        description="Fit every --model to DATA and print a comparison table: "
        "log-likelihood, number of parameters, AIC, BIC, AIC weights, out-of-sample log "
        "score by subject-level k-fold cross-validation, likelihood-ratio tests for nested "
        "specs and Vuong / Clarke tests for non-nested ones (--method bayes: PSIS-LOO).",
    )
    _args.add_data(parser)
    parser.add_argument(
        "--model",
        action="append",
        required=True,
        metavar="SPEC",
        help="a model spec (give at least two)",
    )
    _options.add_option(parser)
    _args.add_method(parser, "Bayes")
    parser.add_argument(
        "--cv-folds",
        type=int,
        default=5,
        metavar="K",
        help="subject-level cross-validation folds (0 to skip; default 5)",
    )
    _args.add_se(
        parser,
        ("hessian", "robust", "none"),
        "standard errors of each fit (default: clustered sandwich)",
    )
    _args.add_max_target(parser, _args.FIT_CAP_HELP)
    _args.add_wealth(parser)
    _args.add_sampler(parser)
    _args.add_hierarchical(parser)
    _args.add_seed(parser, "random seed")
    _args.add_json_file(parser, "the comparison")
    _table.add_table_option(parser)
    _cluster.add_cluster_options(parser)  # the cross-validation folds, one task each
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.api import compare

    _table.check_table_path(args.table)
    if len(args.model) < 2:
        raise StopwiseInputError("compare needs at least two --model options")
    models = [_args.model_from_args(spec, args) for spec in args.model]
    if args.method == "bayes":
        result = compare(
            models,
            args.data,
            method="bayes",
            max_target=args.max_target,
            seed=args.seed,
            chains=args.chains,
            draws=args.draws,
            warmup=args.warmup,
            hierarchical=args.hierarchical,
            parametrisation=args.parametrisation,
            planner_cap=args.planner_cap,
            loo=args.loo,
        )
    else:
        bayes_only = args.parametrisation != "auto" or args.planner_cap != "auto" or args.loo
        if args.hierarchical or bayes_only:
            raise StopwiseInputError(
                "--hierarchical, --parametrisation, --planner-cap and --loo apply to --method bayes"
            )
        if args.cv_folds < 0 or args.cv_folds == 1:
            raise StopwiseInputError("--cv-folds must be 0 (skip) or at least 2")
        se = _args.se_choice(args.se)
        result = compare(
            models,
            args.data,
            max_target=args.max_target,
            seed=args.seed,
            se=se,
            cv_folds=args.cv_folds,
            **_cluster.cluster_kwargs(args),
        )
    if isinstance(getattr(result, "notes", None), list):
        result.notes += option_note(args.options)
    emit(result, args.json)
    _table.write_paper_table(args.table, result, args.table_interval)
    return 0
