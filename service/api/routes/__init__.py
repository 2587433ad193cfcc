"""Routes by topic: ``scores`` (scoring), ``bundles`` (listing, publishing, aliases), ``ops`` (health, metrics)."""
