"""The application around the analysis: jobs (ingest, analyse, diagnose, alarm, report),
the ISA-18.2 alarm life cycle, the morning and monthly reports, notifications, the
daemon, the command line, and cluster and fleet runs."""
