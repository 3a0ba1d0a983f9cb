"""The period report (issue 12): care, deviations, mortality, animals, exposures and corrections for a
period and a scope. `sections` is pure, `queries` reads the records, `render` writes CSV/ZIP/PDF."""
