"""The test tree is a package, so pytest never puts ``tests/`` itself on ``sys.path``: there, a folder such as
``tests/torch/`` would stand in for the torch package (as a namespace) on a machine without torch."""
