"""Measuring and reporting: quality measures, evaluation, figures, guard records and their audit."""
