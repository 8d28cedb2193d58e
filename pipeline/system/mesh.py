"""Meshing: a device outline becomes a Kwant tight-binding system with a lead per contact.

Sites sit at ``((i + 1/2) a, (j + 1/2) a)`` for integer tags ``(i, j)``: an outline whose
corners are multiples of ``a`` then never has a site on its edge, and a strip of width
``N a`` holds exactly ``N`` rows. A site belongs to the device when it lies inside the outline
(``shapely.contains_xy``, vectorised); two neighbouring sites are joined when the midpoint of
their bond lies inside too, so a slit narrower than ``a`` still separates the two sides.

Each contact gets a semi-infinite lead of the contact's width leaving the device along the
contact's outward normal. A lead is either the device material itself or a doped, metallic
version of it (the BHZ bands shifted down by ``contact_doping`` meV, so the Fermi level lies
deep in the conduction band, as under a real ohmic contact).

The finalized system takes everything that varies through ``params``: the onsite matrices of
all sites (potential, Zeeman, exchange, disorder; see :meth:`DeviceSystem.params`) and, when
built with ``with_field=True``, the Peierls phases of a perpendicular field computed by
``kwant.physics.magnetic_gauge``, which handles leads in several directions. A system is
therefore finalized once per geometry.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import kwant
import numpy as np
import shapely

from pipeline.constants import FLUX_QUANTA_PER_T_NM2
from pipeline.device.outline import Device
from pipeline.errors import GeometryError, ModelError
from pipeline.physics.bhz import lattice_matrices, zeeman_matrix
from pipeline.physics.materials import BHZParameters
from pipeline.system.gauge import magnetic_gauge

__all__ = ['Mesh', 'mesh_device', 'DeviceSystem', 'build_system', 'per_contact']

_I4 = np.eye(4, dtype=complex)


@dataclass(frozen=True)
class Mesh:
    """Sites and bonds of a device on the square lattice (pure data, no Kwant objects)."""

    #: lattice constant (nm)
    lattice_constant: float
    #: integer tags (i, j) of the device sites, shape (n, 2)
    tags: np.ndarray
    #: site positions (nm), shape (n, 2)
    positions: np.ndarray
    #: bonds along +x and +y as index pairs (from, to) into ``tags``, shapes (m, 2)
    bonds_x: np.ndarray
    bonds_y: np.ndarray
    #: per contact: tags of the lead's first cell (just outside the device), shape (w, 2)
    lead_cells: tuple[np.ndarray, ...]
    #: per contact: outward normal (lattice direction)
    lead_normals: tuple[tuple[int, int], ...]

    @property
    def n_sites(self) -> int:
        return len(self.tags)


def _tag_range(lo: float, hi: float, a: float) -> np.ndarray:
    return np.arange(int(np.floor(lo / a - 0.5)) - 1, int(np.ceil(hi / a - 0.5)) + 2)


def mesh_device(device: Device, lattice_constant: float) -> Mesh:
    """Sites inside the outline, their bonds, and the first cell of every lead.

    Raises :class:`GeometryError` when the mesh is empty or a contact does not meet device
    sites along its full width (the lead could not attach).
    """
    a = float(lattice_constant)
    if not a > 0:
        raise ModelError(f"lattice constant must be positive (nm), got {lattice_constant!r}")
    minx, miny, maxx, maxy = device.outline.bounds
    ii, jj = np.meshgrid(_tag_range(minx, maxx, a), _tag_range(miny, maxy, a), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    inside = shapely.contains_xy(device.outline, (ii + 0.5) * a, (jj + 0.5) * a)
    tags = np.stack([ii[inside], jj[inside]], axis=1)
    if len(tags) == 0:
        raise GeometryError(
            f"device {device.name!r} contains no lattice site at a = {a} nm: the outline "
            f"(bounds {device.outline.bounds!r}) is smaller than the lattice constant; check "
            f"the units (nm) or use a smaller lattice constant"
        )
    positions = (tags + 0.5) * a
    index = {tuple(t): k for k, t in enumerate(tags.tolist())}

    def bonds(dx: int, dy: int) -> np.ndarray:
        pairs = [
            (k, index[(i + dx, j + dy)])
            for k, (i, j) in enumerate(tags.tolist())
            if (i + dx, j + dy) in index
        ]
        if not pairs:
            return np.zeros((0, 2), dtype=int)
        pairs = np.array(pairs, dtype=int)
        mid = 0.5 * (positions[pairs[:, 0]] + positions[pairs[:, 1]])
        keep = shapely.contains_xy(device.outline, mid[:, 0], mid[:, 1])
        return pairs[keep]

    cells, normals = [], []
    for contact in device.contacts:
        cell = _lead_cell(contact, a)
        nx, ny = contact.normal
        inner = cell - np.array([nx, ny])
        missing = [tuple(t) for t in inner.tolist() if tuple(t) not in index]
        if len(cell) == 0 or missing:
            where = ((missing[0][0] + 0.5) * a, (missing[0][1] + 0.5) * a) if missing else None
            raise GeometryError(
                f"contact {contact.name!r} of device {device.name!r} does not meet device "
                f"sites along its full width at a = {a} nm"
                + (f" (no site at {where!r} nm)" if missing else " (narrower than one site)")
                + "; make the contact lie on a straight stretch of the outline at least as "
                "wide as the contact, or refine the lattice"
            )
        cells.append(cell)
        normals.append((nx, ny))
    return Mesh(a, tags, positions, bonds(1, 0), bonds(0, 1), tuple(cells), tuple(normals))


def _lead_cell(contact, a: float) -> np.ndarray:
    """Tags of the lead's first cell just outside a contact segment."""
    (x0, y0), (x1, y1) = contact.segment.coords[:2]
    nx, ny = contact.normal
    eps = 1e-9 * max(a, 1.0)
    if nx != 0:  # vertical contact: rows j with centre strictly between y0 and y1
        lo, hi = sorted((y0, y1))
        js = np.arange(int(np.floor(lo / a - 0.5)), int(np.ceil(hi / a - 0.5)) + 1)
        js = js[((js + 0.5) * a > lo + eps) & ((js + 0.5) * a < hi - eps)]
        c = x0 / a - 0.5
        i = int(np.ceil(c - eps)) if nx > 0 else int(np.floor(c + eps))
        return np.stack([np.full_like(js, i), js], axis=1)
    lo, hi = sorted((x0, x1))
    is_ = np.arange(int(np.floor(lo / a - 0.5)), int(np.ceil(hi / a - 0.5)) + 1)
    is_ = is_[((is_ + 0.5) * a > lo + eps) & ((is_ + 0.5) * a < hi - eps)]
    c = y0 / a - 0.5
    j = int(np.ceil(c - eps)) if ny > 0 else int(np.floor(c + eps))
    return np.stack([is_, np.full_like(is_, j)], axis=1)


@dataclass
class DeviceSystem:
    """A finalized Kwant system of a device, plus what is needed to fill its ``params``.

    Build it with :func:`build_system`; it is reused for every energy, gate voltage, field
    and disorder realisation.
    """

    device: Device
    material: BHZParameters
    mesh: Mesh
    fsyst: kwant.system.FiniteSystem
    contact_doping: tuple[float, ...]
    with_field: bool
    #: boolean mask of the device sites under each gate, by gate name
    gate_masks: dict[str, np.ndarray]
    #: True: the Kwant system holds only the spin-up block (2 orbitals per site), see
    #: :meth:`block_params`
    spin_block: bool = False
    _gauge: object = field(default=None, repr=False)
    _phase_cache: dict = field(default_factory=dict, repr=False)

    @property
    def positions(self) -> np.ndarray:
        return self.mesh.positions

    @property
    def n_sites(self) -> int:
        return self.mesh.n_sites

    @property
    def contact_names(self) -> tuple[str, ...]:
        return self.device.contact_names

    def onsite_stack(
        self,
        *,
        potential: np.ndarray | float = 0.0,
        gate_potentials: dict[str, float] | None = None,
        b_perp: float = 0.0,
        onsite_extra: np.ndarray | None = None,
    ) -> np.ndarray:
        """Onsite matrices of all device sites (mesh order), shape (n, 4, 4), in meV.

        ``potential`` is an electrostatic potential energy per site (or one number);
        ``gate_potentials`` adds a potential energy to the sites under each named gate;
        ``onsite_extra`` (n, 4, 4) adds any other matrix term (exchange, disorder).
        """
        onsite, _, _ = lattice_matrices(self.material, self.mesh.lattice_constant)
        pot = np.broadcast_to(np.asarray(potential, dtype=float), (self.n_sites,)).copy()
        for name, value in (gate_potentials or {}).items():
            if name not in self.gate_masks:
                raise GeometryError(
                    f"gate {name!r} is not defined on device {self.device.name!r} "
                    f"(gates: {', '.join(self.gate_masks) or 'none'})"
                )
            pot[self.gate_masks[name]] += float(value)
        stack = np.empty((self.n_sites, 4, 4), dtype=complex)
        stack[:] = onsite + zeeman_matrix(self.material, b_perp)
        stack += pot[:, None, None] * _I4
        if onsite_extra is not None:
            stack += onsite_extra
        return stack

    def params(self, *, b_perp: float = 0.0, **onsite_terms) -> dict:
        """The ``params`` dict for Kwant: onsite matrices and, in a field, Peierls phases.

        Keyword arguments other than ``b_perp`` (T) go to :meth:`onsite_stack`.
        """
        if b_perp != 0.0 and not self.with_field:
            raise ModelError(
                f"a perpendicular field b_perp = {b_perp!r} T was requested, but this system "
                f"was built without field support; build it with with_field=True"
            )
        params = {"onsite_stack": self.onsite_stack(b_perp=b_perp, **onsite_terms)}
        if self.with_field:
            params["b_perp"] = float(b_perp)
            params.update(self.peierls_phases(b_perp))
        return params

    def block_params(self, *, b_perp: float = 0.0, **onsite_terms) -> list[tuple[dict, bool]]:
        """Params for the spin-block system: ``[(params, transpose), ...]``.

        With S_z conserved the Hamiltonian is ``H_up (+) H_down`` and ``H_down(B) =
        conj(H_up(-B))`` orbitally, so the spin-down block is solved on the same spin-up
        system with ``conj`` of its onsite matrices and the field reversed; its transmission
        matrix is the transpose of that solve (time reversal exchanges in and out). When the
        two blocks are time-reverses of each other already (no field, no S_z exchange) one
        solve serves both: the list then holds one entry used twice.
        Returns entries ``(params, transpose)``; the total is the sum of the transmissions
        (transposed where asked). Raises :class:`ModelError` if the onsite terms mix spins.
        """
        if not self.spin_block:
            raise ModelError("block_params needs a system built with spin_block=True")
        stack = self.onsite_stack(b_perp=b_perp, **onsite_terms)
        if np.any(stack[:, :2, 2:]) or np.any(stack[:, 2:, :2]):
            raise ModelError(
                "the onsite terms mix spin up and spin down (in-plane exchange or BIA), so the "
                "spin-block reduction does not apply; build the full system (spin_block=False)"
            )
        up = np.ascontiguousarray(stack[:, :2, :2])
        down_tr = np.ascontiguousarray(stack[:, 2:, 2:].conj())
        p_up = self._block_field_params(up, b_perp)
        if b_perp == 0.0 and np.array_equal(up, down_tr):
            return [(p_up, False), (p_up, True)]
        return [(p_up, False), (self._block_field_params(down_tr, -b_perp), True)]

    def _block_field_params(self, stack: np.ndarray, b_perp: float) -> dict:
        if b_perp != 0.0 and not self.with_field:
            raise ModelError(
                f"a perpendicular field b_perp = {b_perp!r} T was requested, but this system "
                f"was built without field support; build it with with_field=True"
            )
        params = {"onsite_stack": stack}
        if self.with_field:
            params["b_perp"] = float(b_perp)
            params.update(self.peierls_phases(b_perp))
        return params

    def peierls_phases(self, b_perp: float) -> dict:
        """Peierls phase functions for a uniform perpendicular field (T), cached per field."""
        key = float(b_perp)
        if key not in self._phase_cache:
            if self._gauge is None:
                # Kwant's magnetic_gauge; contacts too close for it become a ModelError
                self._gauge = magnetic_gauge(self.fsyst, self.device, self.mesh.lattice_constant)
            flux = key * FLUX_QUANTA_PER_T_NM2  # flux quanta per nm^2
            phases = self._gauge(flux, *([flux] * len(self.fsyst.leads)))
            out = {"peierls": phases[0]}
            out.update({f"peierls_lead{i}": ph for i, ph in enumerate(phases[1:])})
            self._phase_cache[key] = out
        return self._phase_cache[key]


def build_system(
    device: Device,
    material: BHZParameters,
    lattice_constant: float,
    *,
    contact_doping: float | dict[str, float] = 0.0,
    with_field: bool = False,
    spin_block: bool = False,
) -> DeviceSystem:
    """Mesh a device and build its finalized Kwant system (one call per geometry).

    Parameters
    ----------
    device:
        The device outline with contacts and gates (validated by the caller, see
        :func:`pipeline.device.outline.validate_device`).
    material:
        BHZ parameters (see :mod:`pipeline.physics.materials`).
    lattice_constant:
        Square-lattice constant ``a`` in nm.
    contact_doping:
        Downward shift (meV) of the bands in the leads, one number or one per contact name:
        0 for leads of the device material, tens of meV for metallic contacts.
    with_field:
        Build hoppings with Peierls phases (needed for any non-zero perpendicular field).
    spin_block:
        Build only the spin-up block (2 orbitals per site). Valid when S_z is conserved
        (no BIA, no in-plane exchange): see :meth:`DeviceSystem.block_params`.
    """
    a = float(lattice_constant)
    mesh = mesh_device(device, a)
    doping = per_contact(contact_doping, device)
    onsite0, tx, ty = lattice_matrices(material, a)
    norbs = 4
    if spin_block:
        if material.delta_bia != 0:
            raise ModelError(
                f"the spin-block reduction needs S_z conservation, but the material has BIA "
                f"coupling delta_bia = {material.delta_bia!r} meV; use the full system"
            )
        onsite0, tx, ty, norbs = onsite0[:2, :2], tx[:2, :2], ty[:2, :2], 2
    lat = kwant.lattice.Monatomic([[a, 0], [0, a]], offset=(0.5 * a, 0.5 * a), norbs=norbs)

    site_index = {lat(int(i), int(j)): k for k, (i, j) in enumerate(mesh.tags.tolist())}

    def onsite(site, onsite_stack):
        return onsite_stack[site_index[site]]

    syst = kwant.Builder()
    syst[site_index.keys()] = onsite
    tags = [tuple(t) for t in mesh.tags.tolist()]
    for bonds, t in ((mesh.bonds_x, tx), (mesh.bonds_y, ty)):
        # Kwant's syst[a, b] = t sets H[a, b]; the model wants H[site + d, site] = T_d.
        keys = [(lat(*tags[j]), lat(*tags[i])) for i, j in bonds.tolist()]
        syst[keys] = _peierls_hopping(t) if with_field else t

    for k, (cell, normal) in enumerate(zip(mesh.lead_cells, mesh.lead_normals)):
        lead = _make_lead(lat, cell, normal, onsite0, tx, ty, doping[k], material, with_field,
                          norbs)
        if with_field:
            lead = lead.substituted(peierls=f"peierls_lead{k}")
        added = syst.attach_lead(lead, origin=lat(*(int(c) for c in cell[0])))
        if added:
            raise GeometryError(
                f"the lead of contact {device.contacts[k].name!r} needed {len(added)} extra "
                f"sites to attach (first at {tuple(added[0].pos)!r} nm): the device edge at "
                f"the contact is not straight; move the contact onto a straight edge"
            )
    fsyst = syst.finalized()
    masks = {
        g.name: shapely.contains_xy(g.region, mesh.positions[:, 0], mesh.positions[:, 1])
        for g in device.gates
    }
    return DeviceSystem(device, material, mesh, fsyst, tuple(doping), with_field, masks,
                        spin_block=spin_block)


def _peierls_hopping(t: np.ndarray):
    """Hopping value function: the constant matrix times the Peierls phase of the bond."""

    def hopping(s1, s2, peierls):
        return t * peierls(s1, s2)

    return hopping


def _make_lead(lat, cell, normal, onsite0, tx, ty, doping, material, with_field, norbs=4):
    a = lat.prim_vecs[0][0]
    sym = kwant.TranslationalSymmetry((normal[0] * a, normal[1] * a))
    lead = kwant.Builder(sym)
    base = onsite0 - doping * np.eye(norbs)
    if with_field:
        def lead_onsite(site, b_perp):
            return base + zeeman_matrix(material, b_perp)[:norbs, :norbs]
        lead[(lat(*t) for t in cell.tolist())] = lead_onsite
    else:
        lead[(lat(*t) for t in cell.tolist())] = base
    for kind, t in (((1, 0), tx), ((0, 1), ty)):
        lead[kwant.builder.HoppingKind(kind, lat)] = _peierls_hopping(t) if with_field else t
    return lead


def per_contact(value, device: Device) -> list[float]:
    names = device.contact_names
    if isinstance(value, dict):
        unknown = sorted(set(value) - set(names))
        if unknown:
            raise GeometryError(
                f"contact_doping names contacts {unknown!r} that device {device.name!r} does "
                f"not have (contacts: {', '.join(names)})"
            )
        return [float(value.get(n, 0.0)) for n in names]
    return [float(value)] * len(names)


def strip_lead(
    material: BHZParameters,
    lattice_constant: float,
    width_sites: int,
    *,
    doping: float = 0.0,
    spin_block: bool = False,
) -> kwant.system.InfiniteSystem:
    """A clean, infinite strip ``width_sites`` wide running along x (for lead-band analysis).

    ``spin_block=True`` keeps only the spin-up block (valid without BIA; the spin-down block
    has the same bands), a quarter of the cost of the mode computation.
    """
    if width_sites < 1:
        raise GeometryError(f"strip width must be at least one site, got {width_sites!r}")
    a = float(lattice_constant)
    onsite0, tx, ty = lattice_matrices(material, a)
    norbs = 4
    if spin_block:
        if material.delta_bia != 0:
            raise ModelError("a spin-block strip needs delta_bia = 0 (BIA mixes the spins)")
        onsite0, tx, ty, norbs = onsite0[:2, :2], tx[:2, :2], ty[:2, :2], 2
    lat = kwant.lattice.Monatomic([[a, 0], [0, a]], offset=(0.5 * a, 0.5 * a), norbs=norbs)
    cell = np.stack([np.zeros(width_sites, dtype=int), np.arange(width_sites)], axis=1)
    lead = _make_lead(lat, cell, (1, 0), onsite0, tx, ty, doping, material, False, norbs)
    return lead.finalized()
