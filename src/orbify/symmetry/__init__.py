"""The symmetry mathematics: groups, filter turning, channel layouts and weight tying (docs/design.md §2–§4, §11)."""
