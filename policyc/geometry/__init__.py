"""Everything about the probability simplex, shared by the checks, diff and plot.

- ``decisions``: the minimum-risk row at posterior vectors, tie tolerance, loss columns aligned by class name;
- ``reach``: linear programs over the simplex (where a row can win, the reach V of a reject option);
- ``intervals``: exact two-class decision intervals on P(second class | x);
- ``sampling``: uniform (scrambled Sobol) points on the simplex, and the share where two loss matrices
  decide differently;
- ``ternary``: the three-class simplex drawn in the plane (raster and exact boundaries).

Nothing here imports the rest of policyc except the runtime's types in signatures; importing the package
loads nothing, so each caller pays only for the module it uses.
"""
