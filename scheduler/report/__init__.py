"""What observers read: tables, exports, charts, explanations."""
