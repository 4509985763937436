"""Views: one module per dashboard page (its data and figures; no dash, no SQL) and the shared helpers."""
