"""gridflow.io"""
