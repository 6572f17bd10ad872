"""The fictional parcel-courier demo feed (built in the newcomer issue)."""
