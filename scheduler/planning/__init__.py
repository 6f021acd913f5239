"""The build pipeline (pure), the planner (storage edge) and the one re-plan action."""
