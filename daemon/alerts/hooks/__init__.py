"""Alert hooks: one module per kind (webhook, email, exec, mqtt) beside a common base."""
