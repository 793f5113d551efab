// Opens the page script: the map, its configuration, data and feature groups, and text helpers.
(function () {
  var map = {{ this._parent.get_name() }};
  var cfg = {{ this.config }};
  var datasets = {{ this.datasets }};
  var groups = { {% for g in this.groups %}"{{ g }}": {{ g }}{{ "," if not loop.last }}{% endfor %} };
  if (cfg.background) { map.getContainer().style.background = cfg.background; }

  function esc(v) {
    return String(v).replace(/[&<>"']/g, function (c) {
      return {"&": "&amp;", "<": "&lt;", ">": "&gt;", '"': "&quot;", "'": "&#39;"}[c];
    });
  }
  function fmt(p) { return (p === null || p === undefined) ? "n/a" : Number(p).toFixed(3); }
