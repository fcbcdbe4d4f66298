"""The bundled demo analysis (installed as ``doseattr.demo``).

Every number in these files is invented: a fictional town and a fictional
study, for trying doseattr out. See README.md beside this file.
"""
