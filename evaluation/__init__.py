"""Benchmark splits, prediction files, evaluation jobs and results (Django app).

The metric math is in ``evaluation.engine``, which imports nothing from Django.
"""
