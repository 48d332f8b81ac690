__version__ = '0.1.0'  # keep in step with package.xml and setup.py
