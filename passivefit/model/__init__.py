"""The data model below the analysis: settings, result types and the schema of names."""
