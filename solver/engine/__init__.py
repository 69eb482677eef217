"""The physics engine: k-space integration, occupations, relaxation times and response tensors.

Pure JAX, no files and no printing: every function takes arrays and frozen parameter objects and
returns arrays, so everything here can be jitted and differentiated.  Nothing in this subpackage
imports from ``crosswind.solver.study``, ``.reporting`` or ``.fitting`` (tests/test_layout.py).
"""
