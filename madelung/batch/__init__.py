"""Batch runs: the descriptors of many structures into one table.

:func:`screen` (in :mod:`.run`) ties the parts together, from the outside in: :mod:`.inputs` (files,
folders, globs, a database -> tasks), :mod:`.tasks` (one structure -> one row), :mod:`.executors`
(local worker pool, Dask), :mod:`.tables` (columns, chunked atomic writer, lock) and :mod:`.progress`.
"""

from .executors import PRELOAD, DaskExecutor, LocalPool
from .inputs import Task, count_tasks, iter_tasks
from .progress import Progress, ScreenSummary
from .run import screen
from .tables import TIMING_COLUMNS, TableLock, TableWriter, output_format, site_table_columns, table_columns
from .tasks import ScreenOptions, failed_row, prepare_process, screen_task, settings_text

__all__ = ["PRELOAD", "DaskExecutor", "LocalPool", "Task", "count_tasks", "iter_tasks", "Progress", "ScreenSummary",
           "screen", "TIMING_COLUMNS", "TableLock", "TableWriter", "output_format", "site_table_columns",
           "table_columns", "ScreenOptions", "failed_row", "prepare_process", "screen_task", "settings_text"]
