"""The participant's side: enrolment, status, pause, withdrawal, background service."""
