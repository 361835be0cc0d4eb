"""Physical units: how long a step lasts and what a link's signal costs.

The model's own numbers are per step and in squared signal units. A spec's
optional ``units:`` section says how many seconds one step lasts and how a
link's signal maps to countable physical events (spikes, radio bits) and to
energy. Two maps are offered:

* ``bits`` (the default, and what every preset uses): a link carries
  ``b`` bits per step, its Gaussian channel capacity at the power it sends
  (``1/2 log2 det(I + N^-1 Cov s)``, the ``bits`` of
  :class:`~hierarchy.loop.evaluate.LinkScore`). It costs ``b / bits_per_event``
  events per step, each of ``energy_per_event`` joules. This assumes the
  physical channel codes at capacity: a real code needs more events.
* ``power``: ``E||s||^2 / power_per_event`` events per step, a linear map
  that the user calibrates (one unit of model power is so many events).

Rates are events per step divided by the step's duration; the energy rate
(watts) is the event rate times ``energy_per_event``. Nothing here changes a
design: prices and budgets stay in model units.

Presets (every number below names its source; "from memory" marks a value
not checked against the publication while this was written):

``neural``
    A spiking pathway of rodent grey matter. Energy per spike from the
    signalling budget of Attwell and Laughlin (2001), "An energy budget for
    signaling in the grey matter of the brain", J Cereb Blood Flow Metab
    21:1133-1145: 3.29e9 ATP per neuron per second at a mean rate of 4 Hz
    (p. 1139, as quoted by the BioNumbers database, entry 108672), of which the resting potential takes 13% (abstract), so the
    spiking part costs 3.29e9 x 0.87 / 4 = 7.2e8 ATP per spike. Two bits per
    spike, as measured in the fly's H1 neuron by Strong, Koberle, de Ruyter
    van Steveninck and Bialek (1998), "Entropy and information in neural
    spike trains", Phys Rev Lett 80:197 (from memory; typical measured values
    are 1-3 bits per spike).
``synapse``
    Graded transmission across a chemical synapse: 1e4 ATP per bit
    (Laughlin, de Ruyter van Steveninck and Anderson, 1998, "The metabolic
    cost of neural information", Nature Neuroscience 1:36-41, abstract;
    they give 1e6-1e7 ATP per bit for graded signals in an interneuron or
    photoreceptor, or for spike coding: :data:`LRA1998_ATP_PER_BIT_NEURON`).
``radio``
    A wireless sensor node with the first-order radio model of Heinzelman,
    Chandrakasan and Balakrishnan (2000), "Energy-efficient communication
    protocol for wireless microsensor networks", HICSS: sending a bit over
    ``d`` metres costs ``E_elec + eps_amp d^2`` and receiving it ``E_elec``,
    with ``E_elec`` = 50 nJ/bit and ``eps_amp`` = 100 pJ/bit/m^2 (from
    memory). A link's energy per bit is both ends:
    ``2 E_elec + eps_amp d^2``, with ``distance`` (default 50 m, our choice).

Both neural presets price an ATP at ``57 kJ/mol / N_A`` = 9.5e-20 J (the
free energy of ATP hydrolysis in cells, about 50-60 kJ/mol; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "AVOGADRO", "ATP_JOULES_PER_MOL", "JOULES_PER_ATP",
    "AL2001_ATP_PER_NEURON_SECOND", "AL2001_MEAN_RATE", "AL2001_RESTING_SHARE", "ATP_PER_SPIKE",
    "SKRB1998_BITS_PER_SPIKE", "LRA1998_ATP_PER_BIT_SYNAPSE", "LRA1998_ATP_PER_BIT_NEURON",
    "HCB2000_E_ELEC", "HCB2000_EPS_AMP", "RADIO_DISTANCE",
    "MAPS", "Preset", "PRESETS", "Units", "radio_energy_per_bit", "physical", "describe",
]

#: Avogadro's number (exact in the SI since 2019).
AVOGADRO = 6.02214076e23
#: Free energy released by hydrolysing one mole of ATP in a cell (from
#: memory; textbooks give about 50-60 kJ/mol under cellular conditions).
ATP_JOULES_PER_MOL = 57e3
#: Joules per ATP molecule.
JOULES_PER_ATP = ATP_JOULES_PER_MOL / AVOGADRO

#: Attwell and Laughlin (2001), p. 1139 (as quoted by BioNumbers, entry
#: 108672): ATP used on signalling per neuron per second at a mean firing
#: rate of :data:`AL2001_MEAN_RATE`.
AL2001_ATP_PER_NEURON_SECOND = 3.29e9
#: The mean firing rate of that estimate (Hz).
AL2001_MEAN_RATE = 4.0
#: The share of it spent on resting potentials, not on spikes (abstract).
AL2001_RESTING_SHARE = 0.13
#: ATP per spike, everything a spike sets off (action potential, transmitter
#: release, postsynaptic currents, recycling), from the three numbers above.
ATP_PER_SPIKE = AL2001_ATP_PER_NEURON_SECOND * (1.0 - AL2001_RESTING_SHARE) / AL2001_MEAN_RATE

#: Strong, Koberle, de Ruyter van Steveninck and Bialek (1998): about two
#: bits per spike in the fly's H1 neuron (from memory).
SKRB1998_BITS_PER_SPIKE = 2.0

#: Laughlin, de Ruyter van Steveninck and Anderson (1998), abstract: ATP per
#: bit at a chemical synapse ...
LRA1998_ATP_PER_BIT_SYNAPSE = 1e4
#: ... and the range for graded signals in an interneuron or photoreceptor,
#: or for spike coding.
LRA1998_ATP_PER_BIT_NEURON = (1e6, 1e7)

#: Heinzelman, Chandrakasan and Balakrishnan (2000), first-order radio model:
#: energy of the electronics per bit sent or received (J/bit; from memory).
HCB2000_E_ELEC = 50e-9
#: ... and of the transmit amplifier per bit and square metre (J/bit/m^2; from memory).
HCB2000_EPS_AMP = 100e-12
#: The radio preset's default distance between the two ends of a link (m): our choice.
RADIO_DISTANCE = 50.0

#: The two ways a link's signal is turned into events.
MAPS = ("bits", "power")


def radio_energy_per_bit(distance: float) -> float:
    """Joules to move one bit over ``distance`` metres in the first-order
    radio model: the sender's electronics and amplifier plus the receiver's
    electronics, ``2 E_elec + eps_amp d^2``.

    Examples
    --------
    >>> round(radio_energy_per_bit(50.0) * 1e9, 6)    # nJ per bit
    350.0
    """
    return 2.0 * HCB2000_E_ELEC + HCB2000_EPS_AMP * distance * distance


@dataclass(frozen=True)
class Preset:
    """Defaults that a ``units: {preset: NAME}`` section starts from."""

    name: str
    what: str
    event: str
    bits_per_event: float
    energy_per_event: float | None  # None: computed from the distance (radio)
    sources: tuple


PRESETS = {
    "neural": Preset(
        "neural", "spiking pathway of rodent grey matter", "spike", SKRB1998_BITS_PER_SPIKE,
        ATP_PER_SPIKE * JOULES_PER_ATP,
        ("Attwell and Laughlin 2001, J Cereb Blood Flow Metab 21:1133: 3.29e9 ATP/neuron/s at 4 Hz, "
         "13% on resting potentials",
         "Strong, Koberle, de Ruyter van Steveninck and Bialek 1998, Phys Rev Lett 80:197: about 2 bits "
         "per spike (from memory)",
         "ATP hydrolysis about 57 kJ/mol (from memory)")),
    "synapse": Preset(
        "synapse", "graded transmission across a chemical synapse", "bit", 1.0,
        LRA1998_ATP_PER_BIT_SYNAPSE * JOULES_PER_ATP,
        ("Laughlin, de Ruyter van Steveninck and Anderson 1998, Nature Neuroscience 1:36: 1e4 ATP per bit "
         "at a chemical synapse",
         "ATP hydrolysis about 57 kJ/mol (from memory)")),
    "radio": Preset(
        "radio", "wireless sensor node, first-order radio model", "bit", 1.0, None,
        ("Heinzelman, Chandrakasan and Balakrishnan 2000, HICSS: 50 nJ/bit electronics, 100 pJ/bit/m^2 "
         "amplifier (from memory)",)),
}


@dataclass(frozen=True)
class Units:
    """A spec's physical units (see the module docstring).

    Attributes
    ----------
    step : float
        Seconds per step.
    map : str
        ``"bits"`` or ``"power"``.
    event : str
        What one counted event is (``spike``, ``bit``, ...).
    per_event : float
        Bits per event (``bits`` map) or model power per event per step
        (``power`` map).
    energy_per_event : float
        Joules per event.
    preset : str or None
    distance : float or None
        Metres between a radio link's ends (the ``radio`` preset).
    sources : tuple of str
        Where the preset's numbers come from.
    """

    step: float
    map: str
    event: str
    per_event: float
    energy_per_event: float
    preset: str | None = None
    distance: float | None = None
    sources: tuple = ()

    def to_dict(self) -> dict:
        out = {"step_seconds": self.step, "map": self.map, "event": self.event,
               ("bits_per_event" if self.map == "bits" else "power_per_event"): self.per_event,
               "energy_per_event_joules": self.energy_per_event, "preset": self.preset,
               "sources": list(self.sources)}
        if self.distance is not None:
            out["distance_m"] = self.distance
        return out


def physical(units: Units, power: float, bits: float) -> dict:
    """A link's physical rates from its model power and bits per step.

    Returns
    -------
    dict
        ``bits_per_second``, ``events_per_second``, ``watts`` (energy per
        second) and ``joules_per_step``; infinite for a noiseless link under
        the ``bits`` map (it carries unbounded information).

    Examples
    --------
    >>> u = Units(step=0.01, map="bits", event="spike", per_event=2.0, energy_per_event=1e-10)
    >>> r = physical(u, power=0.3, bits=1.0)
    >>> r["bits_per_second"], r["events_per_second"], r["watts"]
    (100.0, 50.0, 5e-09)
    """
    per_step = (bits if units.map == "bits" else power) / units.per_event
    # 0 x inf is no number: nothing sent (or free events) costs nothing.
    energy = per_step * units.energy_per_event if per_step and units.energy_per_event else 0.0
    return {"bits_per_second": bits / units.step, "events_per_second": per_step / units.step,
            "watts": energy / units.step, "joules_per_step": energy}


def describe(units: Units) -> str:
    """One line saying what the physical columns assume.

    Examples
    --------
    >>> print(describe(Units(0.01, "bits", "spike", 2.0, 6.8e-11, preset="neural")))
    1 step = 0.01 s; a link's bits per step (its Gaussian channel capacity) at 2 bit per spike, 6.8e-11 J per spike (preset neural)
    """
    if units.map == "bits":
        how = "a link's bits per step (its Gaussian channel capacity)"
        if not (units.event == "bit" and units.per_event == 1):
            how += f" at {units.per_event:g} bit per {units.event}"
    else:
        how = f"a link's power (model units) at {units.per_event:g} per {units.event} per step"
    tail = f" (preset {units.preset}" + (f", {units.distance:g} m" if units.distance is not None else "") + ")" \
        if units.preset else ""
    return f"1 step = {units.step:g} s; {how}, {units.energy_per_event:.3g} J per {units.event}{tail}"
