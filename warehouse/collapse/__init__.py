"""Runs to one observation per treatment and block: the settings, the collapse (in SQL where
it can), coverage and the cautions that come with it."""
