"""Writes the reference tables of tests/io/foreign_formats_test.cpp with astropy
(Debian's python3-astropy 5.2.1): a VOTable in each serialisation, one with two
TABLEs, and ECSV with space and comma delimiters. Run from this folder:
    /usr/bin/python3 make_tables.py
The values are listed in the test; the files are committed so that the test does
not need Python."""
import numpy as np
from astropy.table import Table, MaskedColumn
from astropy.io.votable import from_table, writeto, parse
import io
from astropy.io.votable.tree import VOTableFile, Resource
import astropy.units as u

def table():
    t = Table()
    t['name'] = ['SKDC J132500.0-383600', 'with space, comma', 'ünïcode']
    t['ra_deg'] = np.array([201.25, 0.0, 359.999999999], dtype='f8') * u.deg
    t['dec_deg'] = np.array([-38.6, -89.5, 12.25], dtype='f8') * u.deg
    t['flux_jy'] = np.array([1.5e-3, np.nan, 2.5e-6], dtype='f4') * u.Jy
    t['n_comp'] = np.array([1, 2, 30000], dtype='i2')
    t['id'] = MaskedColumn(np.array([7, -1, 9223372036854775807], dtype='i8'), mask=[False, True, False])
    t['ra_deg'].description = 'Right ascension (ICRS)'
    t.meta['survey'] = 'Skerrywind'
    return t

def reparsed(v):
    # astropy 5.2 writes BINARY2 only from a parsed VOTable (a table made by
    # from_table lacks the version settings BINARY2 needs), so round-trip first.
    b = io.BytesIO()
    v.to_xml(b)
    b.seek(0)
    return parse(b)

t = table()
for fmt in ('tabledata', 'binary', 'binary2'):
    v = from_table(t)
    v.get_first_table().get_field_by_id('id').values.null = -1  # BINARY's null for integers
    v = reparsed(v)
    v.get_first_table().format = fmt
    writeto(v, f'astropy_{fmt}.vot')

# two TABLEs in one RESOURCE: 'first' (one column) and 'sources' (the table above)
first = Table({'x': np.array([1.0, 2.0])})
v = VOTableFile()
res = Resource()
v.resources.append(res)
for name, tab in (('first', first), ('sources', t)):
    src = from_table(tab)
    if 'id' in tab.colnames:
        src.get_first_table().get_field_by_id('id').values.null = -1
    vt = reparsed(src).get_first_table()
    vt.name = name
    vt.ID = name + '_id'
    vt.format = 'binary2'
    res.tables.append(vt)
writeto(v, 'astropy_two_tables.vot')

t.write('astropy_space.ecsv', format='ascii.ecsv', overwrite=True)
t.write('astropy_comma.ecsv', format='ascii.ecsv', delimiter=',', overwrite=True)
