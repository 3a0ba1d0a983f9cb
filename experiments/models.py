"""Protocols, bookings, cohorts and aggregation trials live here (see the trials issue)."""
