"""`coreach recipes`: train named recipes over several training seeds, vet them with the baselines, one table.

By job: `plan` checks the options, `run` trains, vets and records, `stats` builds the rows and the spread
across seeds, `render` writes them for the terminal, Markdown, CSV and JSON. The names below are the ones
other stages and the tests use.
"""

from coreach.commands.recipes.plan import Plan, Recipe, plan_from
from coreach.commands.recipes.render import csv_text, markdown, terminal_table, write_results
from coreach.commands.recipes.run import command_line, compose_stage, recipes, stage_command
from coreach.commands.recipes.stats import assemble, columns, latest_switch, per_goal, rate_at, spread

__all__ = ["Plan", "Recipe", "plan_from", "recipes", "stage_command", "compose_stage", "command_line", "assemble",
           "columns", "latest_switch", "per_goal", "rate_at", "spread", "markdown", "csv_text", "write_results",
           "terminal_table"]
