"""Published (and self-simulated) critical-value tables, one module per source, each with its citation.

Lookups are keyed by significance level (0.10, 0.05, 0.01, ...), never by position, and say what they do
beyond the edges of the table.
"""
