"""The observer's page: a read-only web view of the plan in force, updated live."""
