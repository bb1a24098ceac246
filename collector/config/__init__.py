"""The recipe: what to gather and how politely (reading, validating, the one key schema)."""
