"""REST v1 routes, one module per area: inspections, model, operations (health, metrics, drift, export, page)."""
