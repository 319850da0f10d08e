"""tools/demo"""
