"""Use cases (import a file, show a patient…). Functions take a Session
owned by the caller and never commit."""
