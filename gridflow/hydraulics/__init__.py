"""gridflow.hydraulics"""
