"""XDMF 3 sidecar: field grids and particle frames for general-purpose viewers.

XDMF (eXtensible Data Model and Format, an open standard) is XML that points
into the HDF5 file. Field grids become ``3DRectMesh`` grids with ``VXVYVZ``
geometry (the real coordinate arrays) and node-centred ``potential``
(scalar) and ``field`` (vector) attributes. Particle frames become a
temporal collection of ``Polyvertex`` grids; each frame is a ``HyperSlab``
(start, stride, count) of the concatenated ``/frames/*`` arrays, so nothing
is copied. Paths in the XML are relative to the sidecar's directory.
"""
import os
import types
import xml.etree.ElementTree as ET

from . import schema as S
from .repair import open_for_reading

_NUMBER = {"f": "Float", "i": "Int", "u": "UInt"}


def _item(parent, fname, dpath, ds):
    """A DataItem for ``ds`` (an h5py dataset, or anything with its shape and dtype)."""
    kind = ds.dtype.kind
    el = ET.SubElement(parent, "DataItem", {
        "Dimensions": " ".join(str(n) for n in ds.shape),
        "NumberType": _NUMBER.get(kind, "Float"),
        "Precision": str(ds.dtype.itemsize),
        "Format": "HDF",
    })
    el.text = f"{fname}:{dpath}"
    return el


def _slab(parent, fname, dpath, ds, start, count):
    trailing = ds.shape[1:]
    dims = (count,) + trailing
    slab = ET.SubElement(parent, "DataItem", {
        "ItemType": "HyperSlab",
        "Dimensions": " ".join(str(n) for n in dims),
        "Type": "HyperSlab",
    })
    rank = ds.ndim
    sel = ET.SubElement(slab, "DataItem", {"Dimensions": f"3 {rank}", "Format": "XML"})
    sel.text = " ".join([str(start)] + ["0"] * (rank - 1)) + "  " + " ".join(["1"] * rank) + "  " + \
        " ".join(str(n) for n in dims)
    _item(slab, fname, dpath, ds)
    return slab


def write_xdmf(h5_path, xdmf_path=None):
    """Write the XDMF 3 sidecar of a results file.

    Parameters
    ----------
    h5_path : str or os.PathLike
        The results file.
    xdmf_path : str or os.PathLike, optional
        Where to write (default: ``h5_path`` with its suffix replaced by ``.xdmf``).

    Returns
    -------
    str
        The sidecar's path.
    """
    h5_path = os.fspath(h5_path)
    if xdmf_path is None:
        xdmf_path = os.path.splitext(h5_path)[0] + ".xdmf"
    xdmf_path = os.fspath(xdmf_path)
    fname = os.path.relpath(os.path.abspath(h5_path), os.path.dirname(os.path.abspath(xdmf_path)))
    root = ET.Element("Xdmf", {"Version": "3.0", "xmlns:xi": "http://www.w3.org/2001/XInclude"})
    dom = ET.SubElement(root, "Domain")
    with open_for_reading(h5_path) as f:
        for name in sorted(f.get("fields", {})):
            g = f["fields"][name]
            grid = ET.SubElement(dom, "Grid", {"Name": f"field {name}", "GridType": "Uniform"})
            nx, ny, nz = g["x"].shape[0], g["y"].shape[0], g["z"].shape[0]
            ET.SubElement(grid, "Topology", {"TopologyType": "3DRectMesh",
                                             "NumberOfElements": f"{nz} {ny} {nx}"})
            geo = ET.SubElement(grid, "Geometry", {"GeometryType": "VXVYVZ"})
            for ax in "xyz":
                _item(geo, fname, f"/fields/{name}/{ax}", g[ax])
            if "potential" in g:
                a = ET.SubElement(grid, "Attribute", {"Name": "potential (V)", "AttributeType": "Scalar",
                                                      "Center": "Node"})
                _item(a, fname, f"/fields/{name}/potential", g["potential"])
            if "field" in g:
                a = ET.SubElement(grid, "Attribute", {"Name": "field (V/m)", "AttributeType": "Vector",
                                                      "Center": "Node"})
                _item(a, fname, f"/fields/{name}/field", g["field"])
        if "frames" in f and f["frames/step"].shape[0]:
            fr = f["frames"]
            m = min(fr[k].shape[0] for k in S.FRAME_INDEX)
            rows = min(fr[k].shape[0] for k in S.FRAME_SCHEMA)
            coll = ET.SubElement(dom, "Grid", {"Name": "particles", "GridType": "Collection",
                                               "CollectionType": "Temporal"})
            steps, times, offs, cnts = (fr[k][:m] for k in ("step", "time", "offset", "count"))
            # shape and dtype read once: h5py's lookups cost ~0.1 ms each, and
            # a run with many frames asked for them about 10 times per frame
            meta = {name: types.SimpleNamespace(shape=fr[name].shape, ndim=fr[name].ndim, dtype=fr[name].dtype)
                    for name in S.FRAME_SCHEMA}
            for k in range(m):
                o, c = int(offs[k]), int(cnts[k])
                if o + c > rows or c == 0:
                    continue
                grid = ET.SubElement(coll, "Grid", {"Name": f"step {int(steps[k])}", "GridType": "Uniform"})
                ET.SubElement(grid, "Time", {"Value": repr(float(times[k]))})
                ET.SubElement(grid, "Topology", {"TopologyType": "Polyvertex", "NumberOfElements": str(c),
                                                 "NodesPerElement": "1"})
                geo = ET.SubElement(grid, "Geometry", {"GeometryType": "XYZ"})
                _slab(geo, fname, "/frames/position", meta["position"], o, c)
                for name, (_dt, shp, unit) in S.FRAME_SCHEMA.items():
                    if name == "position":
                        continue
                    a = ET.SubElement(grid, "Attribute", {
                        "Name": f"{name} ({unit})", "AttributeType": "Vector" if shp else "Scalar",
                        "Center": "Node"})
                    _slab(a, fname, f"/frames/{name}", meta[name], o, c)
    tree = ET.ElementTree(root)
    ET.indent(tree)
    tmp = xdmf_path + ".tmp"
    with open(tmp, "wb") as fh:
        fh.write(b'<?xml version="1.0" ?>\n<!DOCTYPE Xdmf SYSTEM "Xdmf.dtd" []>\n')
        tree.write(fh, encoding="utf-8", xml_declaration=False)
    os.replace(tmp, xdmf_path)
    return xdmf_path
