"""Figures (matplotlib, Agg backend), in glmsteps' own visual style."""
