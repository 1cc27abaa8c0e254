"""Default map styles of the GeoPackage layers, as OGC SLD 1.1 / Symbology Encoding 1.1.

Each layer of ``pvscan.gpkg`` gets one style, stored in the ``layer_styles`` table that
desktop GIS reads when it opens a GeoPackage layer (columns ``f_table_catalog``,
``f_table_schema``, ``f_table_name``, ``f_geometry_column``, ``styleName``, ``styleQML``,
``styleSLD``, ``useAsDefault``, ``description``, ``owner``, ``ui``, ``update_time``; the
common convention of desktop GIS, not part of the GeoPackage standard). Features are
coloured by ``severity`` (safety red, repair orange, monitor blue: a diverging
colour-blind-safe scheme), anomalies and work orders are labelled with their ``priority``.
The colours are display choices, never a result.

Desktop GIS reads the ``styleQML`` column first (the QGIS project's own open style format,
``.qml``), so each style is also written as a QML document with the same categories,
colours and labels (:func:`layer_qml`); the SLD is the open-standard copy for any other
software.

References
----------
.. [1] Open Geospatial Consortium, "Styled Layer Descriptor profile of the Web Map Service
   Implementation Specification", version 1.1.0, OGC 05-078r4, 2007.
.. [2] Open Geospatial Consortium, "Symbology Encoding Implementation Specification",
   version 1.1.0, OGC 05-077r4, 2006.
.. [3] C. A. Brewer, ColorBrewer 2.0, "RdBu" diverging scheme (colour-blind safe).
"""
from __future__ import annotations

from xml.sax.saxutils import escape

__all__ = ["SEVERITY_COLOURS", "SLD_NAMESPACE", "SE_NAMESPACE", "OGC_NAMESPACE", "layer_sld", "layer_qml",
           "LAYER_STYLES_SQL"]

SLD_NAMESPACE = "http://www.opengis.net/sld"
SE_NAMESPACE = "http://www.opengis.net/se"
OGC_NAMESPACE = "http://www.opengis.net/ogc"

#: Fill colour per severity (ColorBrewer RdBu ends and an orange between; display only).
SEVERITY_COLOURS = {"safety": "#b2182b", "repair": "#ef8a62", "monitor": "#67a9cf"}
_HEALTHY = "#bdbdbd"
_OUTLINE = "#252525"

#: The table desktop GIS reads default styles from (created when missing).
LAYER_STYLES_SQL = """CREATE TABLE IF NOT EXISTS layer_styles (
    id INTEGER PRIMARY KEY AUTOINCREMENT, f_table_catalog TEXT(256), f_table_schema TEXT(256),
    f_table_name TEXT(256), f_geometry_column TEXT(256), styleName TEXT(30), styleQML TEXT,
    styleSLD TEXT, useAsDefault BOOLEAN, description TEXT, owner TEXT(30), ui TEXT(30),
    update_time DATETIME DEFAULT (strftime('%Y-%m-%dT%H:%M:%fZ', 'now')))"""


def _param(name: str, value: str) -> str:
    return f'<se:SvgParameter name="{name}">{escape(value)}</se:SvgParameter>'


def _filter(prop: str, value: str | None) -> str:
    if value is None:
        return (f"<ogc:Filter><ogc:PropertyIsNull><ogc:PropertyName>{prop}</ogc:PropertyName>"
                "</ogc:PropertyIsNull></ogc:Filter>")
    return (f"<ogc:Filter><ogc:PropertyIsEqualTo><ogc:PropertyName>{prop}</ogc:PropertyName>"
            f"<ogc:Literal>{escape(value)}</ogc:Literal></ogc:PropertyIsEqualTo></ogc:Filter>")


def _symbolizer(kind: str, colour: str, opacity: float) -> str:
    if kind == "point":
        return ("<se:PointSymbolizer><se:Graphic><se:Mark><se:WellKnownName>circle</se:WellKnownName>"
                f"<se:Fill>{_param('fill', colour)}</se:Fill>"
                f"<se:Stroke>{_param('stroke', _OUTLINE)}{_param('stroke-width', '1')}</se:Stroke>"
                "</se:Mark><se:Size>11</se:Size></se:Graphic></se:PointSymbolizer>")
    return (f"<se:PolygonSymbolizer><se:Fill>{_param('fill', colour)}{_param('fill-opacity', f'{opacity:g}')}"
            f"</se:Fill><se:Stroke>{_param('stroke', _OUTLINE)}{_param('stroke-width', '0.5')}</se:Stroke>"
            "</se:PolygonSymbolizer>")


def _rule(name: str, title: str, filt: str, symbolizer: str) -> str:
    return (f"<se:Rule><se:Name>{escape(name)}</se:Name><se:Description><se:Title>{escape(title)}"
            f"</se:Title></se:Description>{filt}{symbolizer}</se:Rule>")


def _label(prop: str) -> str:
    return ("<se:Rule><se:Name>label</se:Name><se:Description><se:Title>priority</se:Title></se:Description>"
            f"<se:TextSymbolizer><se:Label><ogc:PropertyName>{prop}</ogc:PropertyName></se:Label>"
            f"<se:Font>{_param('font-family', 'Sans-Serif')}{_param('font-size', '11')}"
            f"{_param('font-weight', 'bold')}</se:Font>"
            "<se:Halo><se:Radius>1.5</se:Radius><se:Fill>" + _param("fill", "#ffffff") + "</se:Fill></se:Halo>"
            f"<se:Fill>{_param('fill', '#000000')}</se:Fill></se:TextSymbolizer></se:Rule>")


def layer_sld(layer: str, kind: str, *, label: str | None = "priority", healthy: bool = False,
              title: str | None = None) -> str:
    """SLD 1.1 document of one layer: one rule per severity, labels with ``label``.

    Parameters
    ----------
    layer : str
        Layer (table) name.
    kind : {"polygon", "point"}
        Geometry kind of the layer.
    label : str or None
        Property shown as the label (None: no labels).
    healthy : bool
        Add a grey rule for features without a severity (healthy modules).
    title : str, optional
        Title of the style.
    """
    rules = [_rule(sev, sev, _filter("severity", sev), _symbolizer(kind, colour, 0.75))
             for sev, colour in SEVERITY_COLOURS.items()]
    if healthy:
        rules.append(_rule("no finding", "no finding", _filter("severity", None),
                           _symbolizer(kind, _HEALTHY, 0.25)))
    if label:
        rules.append(_label(label))
    return ('<?xml version="1.0" encoding="UTF-8"?>'
            f'<StyledLayerDescriptor version="1.1.0" xmlns="{SLD_NAMESPACE}" xmlns:se="{SE_NAMESPACE}" '
            f'xmlns:ogc="{OGC_NAMESPACE}" xmlns:xlink="http://www.w3.org/1999/xlink" '
            'xmlns:xsi="http://www.w3.org/2001/XMLSchema-instance" '
            f'xsi:schemaLocation="{SLD_NAMESPACE} http://schemas.opengis.net/sld/1.1.0/StyledLayerDescriptor.xsd">'
            f"<NamedLayer><se:Name>{escape(layer)}</se:Name><UserStyle>"
            f"<se:Name>{escape(layer)} by severity</se:Name>"
            f"<se:Description><se:Title>{escape(title or layer + ' by severity')}</se:Title></se:Description>"
            f"<se:FeatureTypeStyle>{''.join(rules)}</se:FeatureTypeStyle>"
            "</UserStyle></NamedLayer></StyledLayerDescriptor>")


def _rgba(colour: str, alpha: float) -> str:
    """``#rrggbb`` and an opacity 0..1 as the ``r,g,b,a`` text of QML colours."""
    r, g, b = (int(colour[k:k + 2], 16) for k in (1, 3, 5))
    return f"{r},{g},{b},{round(255 * alpha)}"


def _qml_options(props: dict[str, str]) -> str:
    options = "".join(f'<Option type="QString" name="{escape(k)}" value="{escape(v)}"/>' for k, v in props.items())
    legacy = "".join(f'<prop k="{escape(k)}" v="{escape(v)}"/>' for k, v in props.items())
    return f'<Option type="Map">{options}</Option>{legacy}'


def _qml_symbol(name: int, kind: str, colour: str, alpha: float) -> str:
    if kind == "point":
        props = {"name": "circle", "color": _rgba(colour, 1.0), "outline_color": _rgba(_OUTLINE, 1.0),
                 "outline_style": "solid", "outline_width": "0.3", "size": "3", "size_unit": "MM"}
        return (f'<symbol type="marker" name="{name}" alpha="1" clip_to_extent="1" force_rhr="0">'
                f'<layer class="SimpleMarker" enabled="1" locked="0" pass="0">{_qml_options(props)}</layer></symbol>')
    props = {"color": _rgba(colour, alpha), "outline_color": _rgba(_OUTLINE, 1.0), "outline_style": "solid",
             "outline_width": "0.26", "outline_width_unit": "MM", "style": "solid"}
    return (f'<symbol type="fill" name="{name}" alpha="1" clip_to_extent="1" force_rhr="0">'
            f'<layer class="SimpleFill" enabled="1" locked="0" pass="0">{_qml_options(props)}</layer></symbol>')


def layer_qml(layer: str, kind: str, *, label: str | None = "priority", healthy: bool = False) -> str:
    """The same style as :func:`layer_sld` as a QML document: a categorised renderer on
    ``severity`` (one category per severity, plus "no finding" for empty values when
    ``healthy``) and, with ``label``, simple labels of that field with a white halo."""
    cats, syms = [], []
    items = [(sev, sev, colour, 0.75) for sev, colour in SEVERITY_COLOURS.items()]
    if healthy:
        items.append(("", "no finding", _HEALTHY, 0.25))
    for k, (value, title, colour, alpha) in enumerate(items):
        cats.append(f'<category type="string" value="{escape(value)}" label="{escape(title)}" symbol="{k}" '
                    'render="true"/>')
        syms.append(_qml_symbol(k, kind, colour, alpha))
    labeling = ""
    if label:
        labeling = ('<labeling type="simple"><settings calloutType="simple">'
                    f'<text-style fieldName="{escape(label)}" isExpression="0" fontFamily="Sans Serif" fontSize="9" '
                    'fontSizeUnit="Point" fontWeight="75" textColor="0,0,0,255" textOpacity="1"/>'
                    '<text-buffer bufferDraw="1" bufferSize="1" bufferSizeUnits="MM" bufferColor="255,255,255,255" '
                    'bufferOpacity="1"/>'
                    f'<placement placement="{0 if kind == "point" else 1}" dist="1" distUnits="MM"/>'
                    '<rendering obstacle="1" drawLabels="1" scaleVisibility="0"/></settings></labeling>')
    geometry_type = 0 if kind == "point" else 2  # QGIS geometry types: 0 point, 1 line, 2 polygon
    return ("<!DOCTYPE qgis PUBLIC 'http://mrcc.com/qgis.dtd' 'SYSTEM'>"
            f'<qgis styleCategories="Symbology|Labeling" labelsEnabled="{1 if label else 0}">'
            '<renderer-v2 type="categorizedSymbol" attr="severity" symbollevels="0" enableorderby="0" '
            f'forceraster="0"><categories>{"".join(cats)}</categories><symbols>{"".join(syms)}</symbols>'
            f"</renderer-v2>{labeling}<layerGeometryType>{geometry_type}</layerGeometryType></qgis>")
