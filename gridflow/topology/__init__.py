"""gridflow.topology"""
