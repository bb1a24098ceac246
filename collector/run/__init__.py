"""The overnight run behind ``collector gather``."""
