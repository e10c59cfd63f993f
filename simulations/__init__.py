"""The invented demo consortium: generated site data, mapping files and a demo model."""
