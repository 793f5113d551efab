// Builds each declared layer from its dataset, then the legend control.
  // Fills of the spillover bands as SVG patterns (lines, dots), so bands differ in grey too.
  function hatch(gj, kind) {
    var svg = map.getPanes().overlayPane.querySelector("svg");
    if (!svg) return;
    var id = "geoexp-hatch-" + kind.name;
    if (!svg.querySelector("#" + id)) {
      var defs = svg.querySelector("defs") || svg.insertBefore(
        document.createElementNS("http://www.w3.org/2000/svg", "defs"), svg.firstChild);
      defs.insertAdjacentHTML("beforeend", kind.svg.replace("__ID__", id));
    }
    gj.eachLayer(function (l) { if (l._path) l._path.setAttribute("fill", "url(#" + id + ")"); });
  }
  cfg.layers.forEach(function (lay) {
    var ds = datasets[lay.data], filter = null;
    if (lay.kind === "condition") {
      filter = function (f) { return f.properties.c === lay.code; };
    } else if (lay.kind === "eligible") {
      filter = function (f) { return f.properties.e === 1; };
    } else if (lay.kind === "decrease") {
      // the result page's stripe over units whose count fell: the sign survives greyscale
      filter = function (f) { return f.properties.c === lay.code && values.change[f.properties.i] < 0; };
    }
    var gj = L.geoJSON(ds.data, {filter: filter, style: layerStyle(lay), interactive: lay.tip !== "none"});
    if (lay.hatch) {
      gj.on("add", function () { hatch(gj, lay.hatch); });
    }
    if (lay.tip === "unit") {
      gj.bindTooltip(unitTip(ds.meta), {sticky: true});
    } else if (lay.tip === "name") {
      gj.eachLayer(function (l) { l.bindTooltip(esc(l.feature.properties.name), {sticky: true}); });
    }
    if (lay.labels) {
      gj.eachLayer(function (l) {
        var pt = l.feature.properties.label_at;
        if (pt) {
          L.tooltip({permanent: true, direction: "center", className: "geoexp-district-label",
                     interactive: false})
            .setLatLng([pt[1], pt[0]]).setContent(esc(l.feature.properties.name)).addTo(groups[lay.group]);
        }
      });
    }
    gj.addTo(groups[lay.group]);
    if (lay.hatch && map.hasLayer(gj)) { hatch(gj, lay.hatch); }
    handle.layers[lay.key] = gj;
    handle.groups[lay.key] = groups[lay.group];
    handle.expected[lay.key] = lay.expected;
  });

  // The legend: a header button folds it away; its height never reaches the layer switcher.
  var Legend = L.Control.extend({
    options: {position: "bottomright"},
    onAdd: function () {
      var box = L.DomUtil.create("div", "geoexp-legend");
      box.id = "geoexp-legend";
      var toggle = L.DomUtil.create("button", "geoexp-legend-toggle", box);
      toggle.id = "geoexp-legend-toggle";
      toggle.type = "button";
      var div = L.DomUtil.create("div", "geoexp-legend-body", box);
      div.id = "geoexp-legend-body";
      div.innerHTML = {{ this.legend_html }};
      function show(open) {
        box.classList.toggle("geoexp-collapsed", !open);
        toggle.setAttribute("aria-expanded", open ? "true" : "false");
        toggle.textContent = open ? "Legend \u25BE hide" : "Legend \u25B8 show";
        fitLegend();
      }
      L.DomEvent.on(toggle, "click", function () { show(box.classList.contains("geoexp-collapsed")); });
      L.DomEvent.disableClickPropagation(box);
      L.DomEvent.disableScrollPropagation(box);
      handle.showLegend = show;
      // Small screens (a laptop at 1280 x 720) open with the legend folded away.
      setTimeout(function () { show(map.getSize().y >= 760); }, 0);
      return box;
    }
  });
  function fitLegend() {
    var box = document.getElementById("geoexp-legend");
    if (!box) return;
    var body = document.getElementById("geoexp-legend-body");
    var mapBox = map.getContainer().getBoundingClientRect();
    var top = mapBox.top + 10;
    document.querySelectorAll(".leaflet-top.leaflet-right .leaflet-control").forEach(function (c) {
      top = Math.max(top, c.getBoundingClientRect().bottom + 10);
    });
    var room = mapBox.bottom - 30 - top;  // above the attribution line
    var header = document.getElementById("geoexp-legend-toggle").getBoundingClientRect().height;
    body.style.maxHeight = Math.max(0, room - header - 20) + "px";
  }
  handle.legend = new Legend().addTo(map);
  handle.fitLegend = fitLegend;
  map.on("resize overlayadd overlayremove", fitLegend);
  window.addEventListener("resize", fitLegend);
