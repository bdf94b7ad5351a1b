"""offline"""
