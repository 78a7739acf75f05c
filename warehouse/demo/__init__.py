"""The invented demo scenario (a pallet-loading heuristic's campaigns) and its walk through the
main job; built on the commands, never imported by them."""
