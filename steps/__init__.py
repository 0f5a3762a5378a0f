"""Processing stages of lodeline, one module per stage.

A module here becomes a stage by defining ``STAGE = lodeline.model.Stage(...)``;
the runner finds it, orders it by its ``after`` stages and validates its table
of the survey configuration. Stages never import the runner or the command line.
"""
