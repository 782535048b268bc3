"""Plant data: records, identification and loop health from routine operation."""
