"""Alert routing: labels, annotations, severity and summaries for events; the Alertmanager sink."""
