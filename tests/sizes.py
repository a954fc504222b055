"""Sizes of the data the shared fixtures generate (tests/conftest.py), for the tests that check them."""

SMALL_STORE = {"n_items": 200, "n_customers": 300, "n_new_items": 20}
PLANTED_EXPLICIT = {"n_users": 600, "n_items": 300, "rank": 2, "noise": 0.5, "oversampling": 4.0}
PLANTED_IMPLICIT = {"n_users": 800, "n_items": 600, "rank": 3, "events_per_user": 60.0, "min_events": 15}
