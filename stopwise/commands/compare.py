"""``stopwise compare DATA --model SPEC --model SPEC ...``: fit several models, compare."""

from __future__ import annotations

import argparse
from typing import Any

from stopwise.commands.fit import emit
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
    parser.add_argument("data", metavar="DATA", help="CSV or Parquet file")
    parser.add_argument(
        "--model",
        action="append",
        required=True,
        metavar="SPEC",
        help="a model spec (give at least two)",
    )
    parser.add_argument(
        "--method",
        choices=("mle", "bayes"),
        default="mle",
        help="maximum likelihood (default) or Bayes",
    )
    parser.add_argument(
        "--cv-folds",
        type=int,
        default=5,
        metavar="K",
        help="subject-level cross-validation folds (0 to skip; default 5)",
    )
    parser.add_argument(
        "--se",
        choices=("hessian", "robust", "none"),
        default=None,
        help="standard errors of each fit (default: clustered sandwich)",
    )
    parser.add_argument(
        "--max-target",
        type=int,
        default=None,
        metavar="M",
        help="cap on the targets a contest model considers",
    )
    parser.add_argument("--chains", type=int, default=4, metavar="C", help="Bayes: chains")
    parser.add_argument(
        "--draws", type=int, default=1000, metavar="D", help="Bayes: draws per chain"
    )
    parser.add_argument(
        "--warmup", type=int, default=1000, metavar="W", help="Bayes: warm-up iterations per chain"
    )
    parser.add_argument(
        "--hierarchical",
        action="store_true",
        help="Bayes: subject-level parameters with population hyperpriors",
    )
    parser.add_argument("--seed", type=int, default=0, metavar="S", help="random seed")
    parser.add_argument(
        "--json",
        metavar="FILE",
        default=None,
        help="write the comparison as JSON to FILE ('-' for stdout)",
    )
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.api import compare

    if len(args.model) < 2:
        raise StopwiseInputError("compare needs at least two --model options")
    if args.method == "bayes":
        result = compare(
            args.model,
            args.data,
            method="bayes",
            max_target=args.max_target,
            seed=args.seed,
            chains=args.chains,
            draws=args.draws,
            warmup=args.warmup,
            hierarchical=args.hierarchical,
        )
    else:
        if args.cv_folds < 0 or args.cv_folds == 1:
            raise StopwiseInputError("--cv-folds must be 0 (skip) or at least 2")
        se = {"none": None, None: "auto"}.get(args.se, args.se)
        result = compare(
            args.model,
            args.data,
            max_target=args.max_target,
            seed=args.seed,
            se=se,
            cv_folds=args.cv_folds,
        )
    emit(result, args.json)
    return 0
