"""Decisions after a fit: how many axes carry signal, whether they are stable, which groups
of samples there are and what characterises each.

Each module here takes a fit's result (and, where it needs per-feature numbers, the matrix
for more streaming passes) and returns tables and manifest records; nothing here prints.
Import from the submodules (``axiscope.decide.signal``, ``.stability``, ``.groups``).
"""
