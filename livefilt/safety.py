"""The usual cautions, in one place: the CLI prints them, the window shows them, every
report page carries them. They defer to local codes and licensed practice."""

__all__ = ["CAUTIONS", "CAUTION"]

CAUTIONS = (
    "An infrared LED or laser diode can harm eyes without any visible warning: know the "
    "laser-safety class of your source, never look into the beam or its specular "
    "reflections, and follow your local rules and your organisation's laser-safety practice.",
    "Lamps, LED drivers and supplies on the mains are dangerous: leave mains wiring to "
    "licensed practice and your local electrical codes; power the sensor from a certified "
    "low-voltage supply.",
)

CAUTION = ("Safety: an infrared LED or laser can harm eyes without a visible warning; follow the "
           "laser-safety class of your source and local rules. Mains-powered lamps and supplies "
           "are dangerous: leave mains wiring to licensed practice and local codes.")
