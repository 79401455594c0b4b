"""Everyday verbs after mining: name clusters (tag), one-shot classes (find), dataset export."""
