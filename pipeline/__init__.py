"""lodeline: headless processing of magnetometer surveys.

The package ``lodeline`` holds the pipeline machinery (configuration, survey data
model, run store, runner and command line); ``lodeline.steps`` holds one module
per processing stage. Stages never import the runner: the runner calls them.
"""

__version__ = "0.1.0"
