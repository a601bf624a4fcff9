"""groupsrc: group statistics for source-space EEG/MEG event-related responses."""

__version__ = "0.1.0"
