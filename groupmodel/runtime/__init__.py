"""Where work runs: cores and CPU quotas, thread and process pools."""
