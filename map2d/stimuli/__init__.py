"""stimuli"""
