"""Rendering of results: plain-text reports, tables for programs, optional figures.

Pure presentation: nothing in this package computes statistics.
"""
