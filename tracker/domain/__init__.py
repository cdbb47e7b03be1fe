"""Pure domain logic: conduction arithmetic, catalogues, plausibility rules. No database, no UI imports."""
