/* Zoom and pan for the time plots of a safety_filter replay report.
 *
 * Part of safety_filter (Apache-2.0). Reads the JSON block #sf-plot-data that
 * safety_filter/replay_report.py writes, draws each time chart with uPlot (inlined
 * before this script, MIT licence) and keeps every chart on one time window, so that a
 * moment can be looked at in position, velocity, torque, intervention and margin at once.
 *
 * Controls: drag across a chart to show that span; Shift+drag to pan; Ctrl+wheel to zoom
 * at the pointer; double-click, or the toolbar, for the whole trial. The
 * toolbar also zooms and pans in steps; the moments tables' buttons show 50 ms around a
 * moment; "#t=<from>,<to>" at the end of the address opens the page on that window [s].
 *
 * State for scripts and tests: window.safetyFilterPlots (view(), show(), reset(),
 * chartViews()) and the data-view-min / data-view-max attributes of #sf-time-plots.
 * Only when every chart is drawn does the page hide the static PNGs (class sf-js on
 * <html>); they stay for print and for browsers without scripts.
 */
(function () {
  'use strict';

  var dataNode = document.getElementById('sf-plot-data');
  var section = document.getElementById('sf-time-plots');
  if (!dataNode || !section || typeof uPlot === 'undefined') {
    return;  // no interactive data or no library: the static PNGs stay
  }
  var spec = JSON.parse(dataNode.textContent);

  // ------------------------------------------------------------------ data
  function decode(text, bytes) {
    var raw = atob(text);
    var buffer = new ArrayBuffer(raw.length);
    var octets = new Uint8Array(buffer);
    for (var i = 0; i < raw.length; i++) {
      octets[i] = raw.charCodeAt(i);
    }
    // Little-endian, as the page's writer stores them (so is every browser's platform).
    return bytes === 8 ? new Float64Array(buffer) : new Float32Array(buffer);
  }

  // uPlot's conventions for missing values: null breaks the line (an input gap, or a
  // value that does not exist), undefined is skipped over (the series has no sample at
  // this time because another series of the chart does). The writer encodes the first as
  // NaN and the second as +Infinity.
  function seriesValues(array) {
    var out = new Array(array.length);
    for (var i = 0; i < array.length; i++) {
      var v = array[i];
      out[i] = v === Infinity ? undefined : (v !== v ? null : v);
    }
    return out;
  }

  var bases = {};
  Object.keys(spec.bases).forEach(function (key) {
    bases[key] = Array.prototype.slice.call(decode(spec.bases[key], 8));
  });

  // ------------------------------------------------------------------ the shared window
  var full = {min: spec.range[0], max: spec.range[1]};
  var view = {min: full.min, max: full.max};
  var minSpan = spec.min_span_s;
  var charts = [];
  var applying = false;
  var label = document.getElementById('sf-view-label');

  function clamp(min, max) {
    var span = max - min;
    if (!(span >= minSpan)) {  // also catches NaN
      var centre = isFinite(min + max) ? 0.5 * (min + max) : 0.5 * (full.min + full.max);
      min = centre - 0.5 * minSpan;
      max = centre + 0.5 * minSpan;
      span = minSpan;
    }
    if (span >= full.max - full.min) {
      return {min: full.min, max: full.max};
    }
    if (min < full.min) {
      max += full.min - min;
      min = full.min;
    }
    if (max > full.max) {
      min -= max - full.max;
      max = full.max;
    }
    return {min: min, max: max};
  }

  function describe() {
    section.setAttribute('data-view-min', String(view.min));
    section.setAttribute('data-view-max', String(view.max));
    if (label) {
      var width = view.max - view.min;
      var whole = view.min <= full.min && view.max >= full.max;
      label.textContent = (whole ? 'whole trial: ' : 'showing ') + '+' +
        view.min.toFixed(4) + ' to +' + view.max.toFixed(4) + ' s (' +
        (width < 1 ? (1000 * width).toPrecision(3) + ' ms' : width.toPrecision(4) + ' s') +
        ')';
    }
  }

  // Puts every chart but `source` (the one the user just zoomed itself) on the window.
  function show(min, max, source) {
    var next = clamp(Number(min), Number(max));
    view.min = next.min;
    view.max = next.max;
    applying = true;
    try {
      charts.forEach(function (u) {
        // The chart the user zoomed has the window already, unless it was clamped.
        if (u !== source || u.scales.x.min !== next.min || u.scales.x.max !== next.max) {
          u.setScale('x', {min: next.min, max: next.max});
        }
      });
    } finally {
      applying = false;
    }
    describe();
    return {min: view.min, max: view.max};
  }

  function zoomAt(at, factor) {
    show(at - (at - view.min) * factor, at + (view.max - at) * factor);
  }

  function pan(fraction) {
    var shift = fraction * (view.max - view.min);
    show(view.min + shift, view.max + shift);
  }

  // ------------------------------------------------------------------ axes
  // Tick labels with as many decimals as the tick step needs (a 50 ms window has ticks
  // 2.5 ms apart: four decimals, not three rounded ones).
  function decimalsFor(step) {
    for (var d = 0; d < 9; d++) {
      var scaled = step * Math.pow(10, d);
      if (Math.abs(scaled - Math.round(scaled)) < 1e-6 * Math.max(1, scaled)) {
        return d;
      }
    }
    return 9;
  }

  function tickLabels(u, splits, axisIdx, space, step) {
    var d = decimalsFor(step || (splits.length > 1 ? splits[1] - splits[0] : 1));
    return splits.map(function (v) { return v == null ? '' : v.toFixed(d); });
  }

  // The y range: the data in view, and (unless "fit y to the data" is ticked) the chart's
  // limit lines, as in the PNGs, so that the distance to a limit stays in sight.
  var fitToData = false;
  function yRange(chart) {
    return function (u, dataMin, dataMax) {
      var low = dataMin;
      var high = dataMax;
      var haveData = low != null && high != null && isFinite(low) && isFinite(high);
      if (!fitToData || !haveData) {
        chart.series.forEach(function (s) {
          if (s.constant !== undefined) {
            low = low == null || !isFinite(low) ? s.constant : Math.min(low, s.constant);
            high = high == null || !isFinite(high) ? s.constant : Math.max(high, s.constant);
          }
        });
      }
      if (low == null || high == null || !isFinite(low) || !isFinite(high)) {
        return [0, 1];
      }
      return uPlot.rangeNum(low, high, 0.1, true);
    };
  }

  // ------------------------------------------------------------------ drawing helpers
  function clipToPlot(u, ctx) {
    var box = u.bbox;
    ctx.beginPath();
    ctx.rect(box.left, box.top, box.width, box.height);
    ctx.clip();
  }

  function drawBands(u, chart) {
    if (!chart.bands || !chart.bands.length) {
      return;
    }
    var ctx = u.ctx;
    var box = u.bbox;
    ctx.save();
    clipToPlot(u, ctx);
    ctx.globalAlpha = 0.25;
    chart.bands.forEach(function (band) {
      var left = u.valToPos(band[0], 'x', true);
      var right = u.valToPos(band[1], 'x', true);
      ctx.fillStyle = band[2];
      ctx.fillRect(left, box.top, Math.max(right - left, 1), box.height);
    });
    ctx.restore();
  }

  function drawOverlay(u, chart) {
    var ctx = u.ctx;
    var box = u.bbox;
    var ratio = window.devicePixelRatio || 1;
    ctx.save();
    clipToPlot(u, ctx);
    ctx.lineWidth = 1.2 * ratio;
    ctx.setLineDash([2 * ratio, 3 * ratio]);
    (spec.events || []).forEach(function (event) {
      var x = u.valToPos(event.t, 'x', true);
      ctx.strokeStyle = event.colour;
      ctx.beginPath();
      ctx.moveTo(x, box.top);
      ctx.lineTo(x, box.top + box.height);
      ctx.stroke();
    });
    ctx.setLineDash([]);
    (chart.marks || []).forEach(function (mark) {
      var x = u.valToPos(mark.t, 'x', true);
      var y = u.valToPos(mark.value, 'y', true);
      var size = 6 * ratio;
      var tip = mark.shape === 'down' ? size : -size;
      ctx.fillStyle = mark.colour;
      ctx.beginPath();
      ctx.moveTo(x, y);
      ctx.lineTo(x - size, y - tip * 1.6);
      ctx.lineTo(x + size, y - tip * 1.6);
      ctx.closePath();
      ctx.fill();
    });
    ctx.restore();
  }

  // ------------------------------------------------------------------ interaction
  function addInteraction(u) {
    // Shift+drag pans. The listener sits on the chart's root in the capture phase, so the
    // library's own drag-to-select never sees these presses.
    u.root.addEventListener('mousedown', function (e) {
      if (!e.shiftKey || e.button !== 0 || !u.over.contains(e.target)) {
        return;
      }
      e.stopPropagation();
      e.preventDefault();
      var startX = e.clientX;
      var start = {min: view.min, max: view.max};
      var perPixel = (start.max - start.min) / Math.max(u.over.clientWidth, 1);
      function move(ev) {
        var shift = -(ev.clientX - startX) * perPixel;
        show(start.min + shift, start.max + shift);
      }
      function up() {
        window.removeEventListener('mousemove', move, true);
        window.removeEventListener('mouseup', up, true);
      }
      window.addEventListener('mousemove', move, true);
      window.addEventListener('mouseup', up, true);
    }, true);
    // Ctrl+wheel zooms at the pointer (and keeps the browser from zooming the page); a
    // plain wheel keeps scrolling the page, which is long.
    u.over.addEventListener('wheel', function (e) {
      if (!(e.ctrlKey || e.metaKey)) {
        return;
      }
      e.preventDefault();
      var rect = u.over.getBoundingClientRect();
      var at = u.posToVal(e.clientX - rect.left, 'x');
      zoomAt(at, Math.pow(1.002, e.deltaY));
    }, {passive: false});
    u.over.addEventListener('dblclick', function (e) {
      e.preventDefault();
      show(full.min, full.max);
    });
  }

  // ------------------------------------------------------------------ charts
  function buildChart(holder, chart, isLast, width) {
    var x = bases[chart.base];
    var data = [x];
    var series = [{label: 'time [s]', value: function (u, v) {
      return v == null ? '-' : '+' + v.toFixed(4);
    }}];
    chart.series.forEach(function (s) {
      var values;
      if (s.constant !== undefined) {
        values = new Array(x.length).fill(s.constant);
      } else {
        values = seriesValues(decode(s.values, 4));
      }
      data.push(values);
      series.push({
        label: s.label,
        stroke: s.colour,
        width: s.width,
        dash: s.dash && s.dash.length ? s.dash : undefined,
        spanGaps: false,
        auto: s.constant === undefined,  // limit lines enter the y range through yRange
        points: {show: false},
        value: function (u, v) {
          return v == null ? '-' : Number(v).toPrecision(4);
        },
      });
    });
    var opts = {
      width: width,
      height: chart.height,
      scales: {x: {time: false}, y: {range: yRange(chart)}},
      series: series,
      axes: [
        {label: isLast ? spec.x_label : undefined, size: isLast ? 44 : 30,
         labelSize: 18, font: '11px sans-serif', labelFont: '12px sans-serif',
         values: tickLabels},
        {label: chart.y_label, size: 60, labelSize: 18, font: '11px sans-serif',
         labelFont: '12px sans-serif'},
      ],
      legend: {live: true},
      cursor: {
        sync: {key: 'sf-time', setSeries: false},
        drag: {x: true, y: false, setScale: true},
        // Double-click is ours (the whole trial on every chart), not the library's.
        bind: {dblclick: function () { return null; }},
      },
      hooks: {
        drawClear: [function (u) { drawBands(u, chart); }],
        draw: [function (u) { drawOverlay(u, chart); }],
        setScale: [function (u, key) {
          if (key === 'x' && !applying) {
            show(u.scales.x.min, u.scales.x.max, u);
          }
        }],
      },
    };
    var u = new uPlot(opts, data, holder);
    u.sfChart = chart;
    addInteraction(u);
    return u;
  }

  function figureWidth(container) {
    return Math.max(320, Math.floor(container.clientWidth || section.clientWidth || 900));
  }

  spec.figures.forEach(function (figure) {
    var container = document.getElementById('sf-live-' + figure.id);
    if (!container) {
      return;
    }
    container.hidden = false;
    var width = figureWidth(container);
    figure.charts.forEach(function (chart, index) {
      var holder = document.createElement('div');
      holder.className = 'sf-chart';
      holder.setAttribute('data-chart', chart.title);
      container.appendChild(holder);
      charts.push(buildChart(holder, chart, index === figure.charts.length - 1, width));
    });
  });

  var resizeTimer = null;
  window.addEventListener('resize', function () {
    clearTimeout(resizeTimer);
    resizeTimer = setTimeout(function () {
      charts.forEach(function (u) {
        var width = figureWidth(u.root.parentNode.parentNode);
        u.setSize({width: width, height: u.sfChart.height});
      });
    }, 150);
  });

  // ------------------------------------------------------------------ toolbar and links
  function on(id, handler) {
    var node = document.getElementById(id);
    if (node) {
      node.addEventListener('click', handler);
    }
  }
  on('sf-zoom-in', function () { zoomAt(0.5 * (view.min + view.max), 0.5); });
  on('sf-zoom-out', function () { zoomAt(0.5 * (view.min + view.max), 2.0); });
  on('sf-pan-left', function () { pan(-0.4); });
  on('sf-pan-right', function () { pan(0.4); });
  on('sf-whole', function () { show(full.min, full.max); });
  var fitBox = document.getElementById('sf-fit-y');
  if (fitBox) {
    fitBox.addEventListener('change', function () {
      fitToData = fitBox.checked;
      charts.forEach(function (u) {  // re-range every y axis on the same window
        u.setScale('x', {min: view.min, max: view.max});
      });
    });
  }
  Array.prototype.forEach.call(document.querySelectorAll('button.sf-moment'), function (b) {
    b.addEventListener('click', function () {
      var t = Number(b.getAttribute('data-t'));
      var half = Number(b.getAttribute('data-half-width')) || 0.025;
      show(t - half, t + half);
      section.scrollIntoView({block: 'start'});
    });
  });

  var asked = /(?:^#|&)t=([-+0-9.eE]+),([-+0-9.eE]+)/.exec(window.location.hash);
  if (asked) {
    show(Number(asked[1]), Number(asked[2]));
  } else {
    show(full.min, full.max);
  }

  window.safetyFilterPlots = {
    /** The shared window {min, max} [s from the start of the trial]. */
    view: function () { return {min: view.min, max: view.max}; },
    /** Show [min, max] on every chart (kept inside the trial); returns the window shown. */
    show: function (min, max) { return show(min, max); },
    /** Show the whole trial. */
    reset: function () { return show(full.min, full.max); },
    /** Each chart's own x range, as the library holds it (they agree when in step). */
    chartViews: function () {
      return charts.map(function (u) {
        return {chart: u.sfChart.title, min: u.scales.x.min, max: u.scales.x.max};
      });
    },
    full: {min: full.min, max: full.max},
  };
  document.documentElement.classList.add('sf-js');
})();
