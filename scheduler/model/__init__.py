"""The ground floor: errors, time and grid rules, configuration, requests, the plan contract. Imports nothing else of ours."""
