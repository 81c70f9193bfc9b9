"""Pure rules: the policy set, consent versions, decisions, and the engine that alone mints grants."""
