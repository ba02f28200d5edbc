"""stopwise.data_schemas: what the data look like; read, validate, convert, bundle.

Modules (imported on demand, so that ``errors`` stays cheap for the command line):
``columns`` (the three formats' columns), ``reading`` (CSV/Parquet/DataFrame in),
``validate`` (every problem at once), ``report`` (Problem, ValidationReport), ``load``
(Dataset), ``convert`` (trial <-> decision level), ``bundle`` (StoppingData/LotteryData),
``arrays`` (the bundle types) and ``errors``.
"""
