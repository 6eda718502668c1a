"""The clinical audit: rates over the stored laser sessions, set against published series.

stats    Wilson intervals and funnel-plot control limits (pure functions)
report   the audit's figures from the store's aggregates
render   the figures as an HTML page (SVG funnel plots) or CSV
"""
