"""Seeded random compositions of ops with a backward correct by construction, for the property
suite (tests/test_property_suite.py) and its large run (bench/property_suite.py).

- :mod:`.backend`: numpy and mpmath namespaces the ops' forwards are written against;
- :mod:`.ops`: each op's forward and vector-Jacobian product, written once;
- :mod:`.graph`: a network as op nodes, its forward and its reverse-sweep backward;
- :mod:`.builder`: random networks, with points placed at, near or off kinks;
- :mod:`.bugs`: one planted bug per network copy, and which tensors it makes wrong;
- :mod:`.reference`: derivatives of the mpmath forward by ``mpmath.diff`` (mp.dps = 40);
- :mod:`.scale`: which gradients a difference can resolve at all, and overflowing draws;
- :mod:`.cases`: the categories, one seeded case each, and what the report must say;
- :mod:`.large`: ~31k- and ~290k-param ReLU/tanh MLPs with one wrong gradient element.
"""
