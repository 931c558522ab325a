// The what-if in the browser: the arithmetic of linkage.decide.whatif.predict_whatif on the
// lean model embedded in this page, operation for operation (see linkage/report/page.py).
// No network, no library: everything the page needs is in it.
"use strict";
(function () {
  // ---------------------------------------------------------------- the embedded numbers
  function b64(s) {
    const bin = atob(s);
    const out = new Uint8Array(bin.length);
    for (let i = 0; i < bin.length; i++) out[i] = bin.charCodeAt(i);
    return out.buffer;
  }
  function decode(o) {
    if (Array.isArray(o)) return o.map(decode);
    if (o !== null && typeof o === "object") {
      if (typeof o.f64 === "string" || typeof o.i32 === "string") {
        const a = o.f64 !== undefined ? new Float64Array(b64(o.f64)) : new Int32Array(b64(o.i32));
        a.shape = o.shape;
        return a;
      }
      const out = {};
      for (const k of Object.keys(o)) out[k] = decode(o[k]);
      return out;
    }
    return o;
  }
  const M = decode(JSON.parse(document.getElementById("model").textContent));
  const TINY = 2.2250738585072014e-308; // np.finfo(float).tiny
  const ETA_MAX = 700.0;
  const TOL = 1e-9; // linkage.decide.compendial._TOL
  const EPS = 1e-9; // linkage.models.conformal._EPS
  const RELEASE = [0.0, 150.0];

  const clip = (v, lo, hi) => (v < lo ? lo : v > hi ? hi : v);
  const lowEnd = (r) => (r[0] === null ? -Infinity : r[0]);
  const highEnd = (r) => (r[1] === null ? Infinity : r[1]);
  function row(a, i) { // row i of a 2-d typed array
    const w = a.shape[1];
    const out = a.subarray(i * w, (i + 1) * w);
    return out;
  }
  function at2(a, i, j) { return a[i * a.shape[1] + j]; }

  // ---------------------------------------------------------------- lean.Model.predict (one row)
  function linkInverse(link, eta, yMax) {
    if (link === "identity") return eta;
    eta = clip(eta, -ETA_MAX, ETA_MAX);
    if (link === "log") return Math.exp(eta);
    if (link === "cloglog") return -yMax * Math.expm1(-Math.exp(eta));
    throw new Error("unknown link " + link);
  }
  function predictOne(m, x) {
    switch (m.kind) {
      case "mean": return m.mean;
      case "rd": return m.s0 * Math.exp(-m.k * x[m.porosity_index]);
      case "linear": {
        let s = 0;
        for (let j = 0; j < x.length; j++) s += (x[j] - m.x_mean[j]) * m.coef[j];
        return s + m.intercept;
      }
      case "quadratic": {
        const p = x.length, z = new Float64Array(p);
        for (let j = 0; j < p; j++) z[j] = (x[j] - m.x_mean[j]) / m.x_scale[j];
        let s = 0, k = 0;
        for (let j = 0; j < p; j++) s += z[j] * m.beta[k++];
        for (let j = 0; j < p; j++) s += z[j] ** 2 * m.beta[k++];
        for (let i = 0; i < p; i++) for (let j = i + 1; j < p; j++) s += z[i] * z[j] * m.beta[k++];
        return s + m.intercept;
      }
      case "trees": {
        const nTrees = m.feature.shape[0], w = m.feature.shape[1];
        let raw = 0;
        raw += m.baseline;
        for (let t = 0; t < nTrees; t++) {
          let node = 0;
          for (let d = 0; d < m.depth; d++) {
            const i = t * w + node;
            if (m.leaf[i]) break;
            node = x[m.feature[i]] <= m.threshold[i] ? m.left[i] : m.right[i];
          }
          raw += m.value[t * w + node];
        }
        return raw;
      }
      case "link": {
        let s = 0;
        for (let j = 0; j < x.length; j++) {
          const h = m.log_mask[j] ? Math.log(Math.max(x[j], TINY)) : x[j];
          s += (h - m.x_mean[j]) * m.coef[j];
        }
        return linkInverse(m.link, s + m.intercept, m.y_max);
      }
    }
    throw new Error("unknown model kind " + m.kind);
  }
  // the model at each of D draws of its inputs (cols: a number or an array of D per input);
  // logs: a cache of ln(max(x, tiny)) per column array, shared by the targets of a stage
  function predictMany(m, cols, D, logs, out) {
    const p = cols.length;
    out = out || new Float64Array(D);
    if (m.kind === "link") {
      const h = cols.map((c, j) => {
        if (!m.log_mask[j]) return c;
        if (typeof c === "number") return Math.log(Math.max(c, TINY));
        let l = logs && logs.get ? logs.get(c) : undefined;
        if (!l) {
          l = logs && logs.alloc ? logs.alloc(c.length) : new Float64Array(c.length);
          for (let i = 0; i < c.length; i++) l[i] = Math.log(Math.max(c[i], TINY));
          if (logs && logs.set) logs.set(c, l);
        }
        return l;
      });
      const xm = m.x_mean, cf = m.coef, b0 = m.intercept, link = m.link, yMax = m.y_max;
      const arr = h.map((c) => (typeof c === "number" ? null : c)), val = h.map((c) => (typeof c === "number" ? c : 0));
      for (let d = 0; d < D; d++) {
        let s = 0;
        for (let j = 0; j < p; j++) { const a = arr[j]; s += ((a !== null ? a[d] : val[j]) - xm[j]) * cf[j]; }
        out[d] = s + b0;
      }
      if (link === "identity") return out;
      for (let d = 0; d < D; d++) { // linkInverse, its cases taken once per model
        const eta = clip(out[d], -ETA_MAX, ETA_MAX);
        if (link === "log") out[d] = Math.exp(eta);
        else if (link === "cloglog") out[d] = -yMax * Math.expm1(-Math.exp(eta));
        else throw new Error("unknown link " + link);
      }
      return out;
    }
    const x = new Float64Array(p);
    for (let d = 0; d < D; d++) {
      for (let j = 0; j < p; j++) { const c = cols[j]; x[j] = typeof c === "number" ? c : c[d]; }
      out[d] = predictOne(m, x);
    }
    return out;
  }
  function spreadScale(sp, level) { // lean.spread_scale
    const z = clip(level, sp.z_low, sp.z_high);
    return Math.exp(sp.a + sp.b * (z - sp.z_mean) / sp.z_scale);
  }

  // ---------------------------------------------------------------- numpy's pieces
  function lerp(a, b, t) { // numpy _lerp
    const d = b - a;
    return t >= 0.5 ? b - d * (1 - t) : a + d * t;
  }
  function quantileSorted(s, q) { // np.quantile, method "linear", on sorted finite values
    const n = s.length;
    if (n === 0) return NaN;
    const v = (n - 1) * q;
    if (v >= n - 1) return s[n - 1];
    if (v < 0) return s[0];
    const i = Math.floor(v);
    return lerp(s[i], s[i + 1], v - i);
  }
  function sorted(a) { return Float64Array.from(a).sort(); }
  function select(a, k, lo, hi) { // a[k] as in sorted order, a rearranged around it (quickselect, in place)
    while (hi > lo) {
      const pivot = a[(lo + hi) >> 1];
      let i = lo, j = hi;
      while (i <= j) {
        while (a[i] < pivot) i++;
        while (a[j] > pivot) j--;
        if (i <= j) { const t = a[i]; a[i] = a[j]; a[j] = t; i++; j--; }
      }
      if (k <= j) hi = j; else if (k >= i) lo = i; else break;
    }
    return a[k];
  }
  function quantiles(values, qs) { // np.quantile(values, qs), method "linear", values finite
    const a = Float64Array.from(values), n = a.length;
    return qs.map((q) => {
      const v = (n - 1) * q;
      if (v >= n - 1) return select(a, n - 1, 0, n - 1);
      if (v < 0) return select(a, 0, 0, n - 1);
      const i = Math.floor(v), x = select(a, i, 0, n - 1);
      let y = a[i + 1]; // the smallest value right of i (all there are >= a[i] after the selection)
      for (let k = i + 2; k < n; k++) if (a[k] < y) y = a[k];
      return lerp(x, y, v - i);
    });
  }
  function nanquantile(a, q) {
    const s = sorted(Array.from(a).filter((v) => !Number.isNaN(v)));
    return quantileSorted(s, q);
  }
  function mean(a) { let s = 0; for (let i = 0; i < a.length; i++) s += a[i]; return s / a.length; }
  function interp(x, xp, fp) { // np.interp
    const n = xp.length;
    if (x < xp[0]) return fp[0];
    if (x > xp[n - 1]) return fp[n - 1];
    if (x === xp[n - 1]) return fp[n - 1];
    let lo = 0, hi = n - 1;
    while (hi - lo > 1) { const mid = (lo + hi) >> 1; if (xp[mid] <= x) lo = mid; else hi = mid; }
    const slope = (fp[lo + 1] - fp[lo]) / (xp[lo + 1] - xp[lo]);
    return slope * (x - xp[lo]) + fp[lo];
  }

  // ---------------------------------------------------------------- propagate.fill_settings
  function neededSettings(given) {
    const produced = new Set(Object.keys(given)), needed = [];
    for (const st of M.stages) {
      if (st.targets.every((t) => t.target in given)) continue;
      for (const c of st.inputs) if (!produced.has(c) && !needed.includes(c)) needed.push(c);
      for (const t of st.targets) produced.add(t.target);
    }
    return needed;
  }
  function pinvSymmetric(A, rcond) { // np.linalg.pinv(A, rcond, hermitian=True): eigenvectors by cyclic Jacobi
    const n = A.length, a = A.map((r) => r.slice()), V = A.map((r, i) => r.map((_, j) => (i === j ? 1 : 0)));
    for (let sweep = 0; sweep < 100; sweep++) {
      let off = 0;
      for (let i = 0; i < n; i++) for (let j = i + 1; j < n; j++) off += a[i][j] * a[i][j];
      if (off < 1e-300) break;
      for (let p = 0; p < n; p++) for (let q = p + 1; q < n; q++) {
        if (a[p][q] === 0) continue;
        const theta = (a[q][q] - a[p][p]) / (2 * a[p][q]);
        const t = Math.sign(theta || 1) / (Math.abs(theta) + Math.sqrt(theta * theta + 1));
        const c = 1 / Math.sqrt(t * t + 1), sn = t * c;
        for (let k = 0; k < n; k++) { // a <- J^T a J, V <- V J
          const akp = a[k][p], akq = a[k][q];
          a[k][p] = c * akp - sn * akq; a[k][q] = sn * akp + c * akq;
        }
        for (let k = 0; k < n; k++) {
          const apk = a[p][k], aqk = a[q][k];
          a[p][k] = c * apk - sn * aqk; a[q][k] = sn * apk + c * aqk;
        }
        for (let k = 0; k < n; k++) {
          const vkp = V[k][p], vkq = V[k][q];
          V[k][p] = c * vkp - sn * vkq; V[k][q] = sn * vkp + c * vkq;
        }
      }
    }
    const lam = a.map((r, i) => r[i]), cutoff = rcond * Math.max(...lam.map(Math.abs));
    const inv = lam.map((l) => (Math.abs(l) > cutoff ? 1 / l : 0));
    return A.map((_, i) => A.map((__, j) => { let s = 0; for (let k = 0; k < n; k++) s += V[i][k] * inv[k] * V[j][k]; return s; }));
  }
  // The given values plus every other needed setting, as linkage.decide.propagate.fill_settings holds
  // it: with the model's normal model of the training settings (settings_*), at the conditional mean
  // given the given settings, μ_m + Σ_mg Σ_gg⁺ (x_g − μ_g), clipped to the training range (the mean
  // when nothing is given); a setting run at few levels (settings_levels non-empty) at the level
  // nearest that mean (the lower on a tie), then the other held settings given the given ones and
  // those levels when any is given (linkage.decide.held.hold); without it, or for a setting it does not know, at the
  // training median.
  function fillSettings(given) {
    const values = Object.assign({}, given), source = {};
    for (const k of Object.keys(given)) source[k] = "given";
    let needed = neededSettings(given);
    const names = M.settings_names;
    if (names && names.length && M.settings_mean && M.settings_cov) {
      const p = names.length, mu = M.settings_mean, idx = {};
      names.forEach((n, i) => { idx[n] = i; });
      const cov = (i, j) => (M.settings_cov.shape ? M.settings_cov[i * p + j] : M.settings_cov[i][j]);
      const levels = (m) => (M.settings_levels && M.settings_levels[m]) || [];
      const heldAt = (on, todo) => {  // the conditional mean of todo given the values in on, clipped
        const cond = Object.keys(on).map((n) => idx[n]);
        const P = cond.length ? pinvSymmetric(cond.map((i) => cond.map((j) => cov(i, j))), 1e-10) : null;
        for (const name of todo) {
          const m = idx[name];
          let v = mu[m];
          if (cond.length) {
            const wts = cond.map((_, k) => { let s = 0; cond.forEach((g, l) => { s += cov(m, g) * P[l][k]; }); return s; });
            let s = 0;
            cond.forEach((g, k) => { s += (on[names[g]] - mu[g]) * wts[k]; });
            v = mu[m] + s;
          }
          values[name] = clip(v, M.settings_low[m], M.settings_high[m]);
        }
      };
      const nearest = (v, lv) => { let best = lv[0]; for (const l of lv) if (Math.abs(v - l) < Math.abs(v - best)) best = l; return best; };
      const on = {};
      Object.keys(given).filter((n) => n in idx).forEach((n) => { on[n] = given[n]; });
      const todo = needed.filter((n) => n in idx);
      heldAt(on, todo);
      const discrete = todo.filter((n) => levels(idx[n]).length);
      if (discrete.length) {
        const onLevels = Object.assign({}, on);
        for (const name of discrete) { values[name] = nearest(values[name], levels(idx[name])); onLevels[name] = values[name]; }
        const rest = todo.filter((n) => !discrete.includes(n));
        if (rest.length && Object.keys(on).length) heldAt(onLevels, rest);  // nothing given: the mean
      }
      for (const name of todo) {  // held.sources: a few-level setting is at a level, not at a mean
        const atLevel = levels(idx[name]).length > 0;
        source[name] = Object.keys(on).length ? (atLevel ? M.held_labels.coherent_level : M.held_labels.coherent)
          : (atLevel ? M.held_labels.mean_level : M.held_labels.mean);
      }
      needed = needed.filter((n) => !(n in idx));
    }
    for (const name of needed) {
      const m = M.medians[name];
      if (m === null || m === undefined || !Number.isFinite(m)) throw new Error(name + " has no training median");
      values[name] = m;
      source[name] = M.held_labels.median;
    }
    return { values, source };
  }

  // ---------------------------------------------------------------- CV+ (conformal.py)
  const lowerRank = (n, alpha) => Math.floor(alpha * (n + 1) + EPS);
  const upperRank = (n, alpha) => Math.ceil((1 - alpha) * (n + 1) - EPS);
  function kth(vals, k) { return Float64Array.from(vals).sort()[k - 1]; }
  function cvPlus(preds, foldOf, residuals, alpha) {
    const n = residuals.length, lo = [], hi = [];
    for (let i = 0; i < n; i++) {
      const c = preds[foldOf[i]], r = Math.abs(residuals[i]);
      lo.push(c - r); hi.push(c + r);
    }
    const lk = lowerRank(n, alpha), hk = upperRank(n, alpha);
    return [lk < 1 ? -Infinity : kth(lo, lk), hk > n ? Infinity : kth(hi, hk)];
  }
  function linkWeight(link, y, yMax) { // lean.link_weights, one value
    if (link === "identity") return 1;
    if (link === "log") return y ** 2;
    const q = clip(y / yMax, 1e-9, 1 - 1e-9);
    return (yMax * (1 - q) * -Math.log1p(-q)) ** 2;
  }
  function leverageScale(m, lev, x) { // lean.leverage_scale, one row
    const cols = lev.columns, k = cols.length + 1, d = new Float64Array(k);
    d[0] = 1;
    for (let a = 0; a < cols.length; a++) {
      const j = cols[a], v = m.log_mask[j] ? Math.log(Math.max(x[j], TINY)) : x[j];
      d[a + 1] = v - m.x_mean[j];
    }
    let q = 0;
    for (let a = 0; a < k; a++) { let r = 0; for (let b = 0; b < k; b++) r += at2(lev.cov, a, b) * d[b]; q += d[a] * r; }
    const h = linkWeight(m.link, predictOne(m, x), m.y_max) * q;
    return Math.sqrt(1 + lev.factor * Math.max(h, 0));
  }
  function lwCvPlus(preds, foldOf, residuals, lotScale, s, alpha) { // conformal.lw_cv_plus_interval at one x
    const res = residuals.map((r, i) => r / lotScale[i]);
    const [l, h] = cvPlus(preds.map((p) => p / s), foldOf, res, alpha);
    return [l * s, h * s];
  }
  function interval(t, x, level) { // lean.Target.interval, raw
    const alpha = 1 - level;
    const b = t.spread ? null : t.interval; // studentized CV+ of the whole procedure, where given
    // the fold models and residuals of the interval given; each fold model predicts once
    const preds = (b ? b.fold_models : t.fold_models).map((m) => predictOne(m, x));
    if (t.spread) return lwCvPlus(preds, t.fold_of, t.residuals, t.lot_scale, spreadScale(t.spread, predictOne(t.model, x)), alpha);
    if (b && b.leverage) return lwCvPlus(preds, t.fold_of, b.residuals, b.lot_scale, leverageScale(t.model, b.leverage, x), alpha);
    return cvPlus(preds, t.fold_of, b ? b.residuals : t.residuals, alpha);
  }

  // ---------------------------------------------------------------- applicability domain
  const NOT_UNITS = new Set(["-", "ISO 8601", "sieve | laser", "bool", "count"]);
  // a unit in a column heading as a reader writes it (linkage.report.figures.PRETTY_UNITS, embedded by page.py);
  // texts that mirror Python's keep "um"
  const PRETTY_UNITS = M.pretty_units;
  // a column heading with its unit as the report and the what-if sheet write it (figures.shown_unit, embedded by
  // page.py as shown_units: an extra column such as api_d50_um gets its unit from its name's ending)
  const heading = (name, u) => {
    const shown = M.shown_units && name in M.shown_units ? M.shown_units[name] : (u && !NOT_UNITS.has(u) ? PRETTY_UNITS[u] || u : "-");
    return name + (shown && shown !== "-" ? ` [${shown}]` : "");
  };
  // a spec's limits as the predictions table writes them: "≥ 80", not the spec file's ">= 80"
  const limitsText = (t) => String(t).replace(">=", "≥").replace("<=", "≤");
  // a sentence with its units as a reader sees them (figures.shown_units_text): "590.6 um" gets PRETTY_UNITS.um; only a
  // unit right after a number (a column name such as granule_d50_um stays). The what-if's own texts keep "um"
  // (they mirror Python's); this is for showing them.
  const shownUnitsText = (text) => Object.entries(PRETTY_UNITS).reduce((t, [raw, pretty]) =>
    t.replace(new RegExp("(\\d) " + raw.replace(/[.*+?^${}()|[\]\\/]/g, "\\$&") + "(?![\\w/])", "g"), "$1 " + pretty), String(text));
  function fmt(v, digits = 4) { // Python's format(v, ".4g"), or another number of digits
    if (!Number.isFinite(v)) return String(v);
    if (v === 0) return "0";
    const [mant, ex] = v.toExponential(digits - 1).split("e");
    const e = parseInt(ex, 10);
    const strip = (s) => (s.includes(".") ? s.replace(/0+$/, "").replace(/\.$/, "") : s);
    if (e < -4 || e >= digits) return strip(mant) + "e" + (e < 0 ? "-" : "+") + String(Math.abs(e)).padStart(2, "0");
    return strip(v.toFixed(digits - 1 - e));
  }
  function fmtBeyond(value, limit) { // lean.py's _fmt_beyond: digits until the two texts differ
    let digits = 4;
    while (fmt(value, digits) === fmt(limit, digits) && digits < 12) digits += 1;
    return [fmt(value, digits), fmt(limit, digits)];
  }
  function withUnit(name, v) {
    const u = M.units[name] || "-";
    return NOT_UNITS.has(u) ? fmt(v) : fmt(v) + " " + u;
  }
  function rangeReason(d, c, v) { // lean.py's _range_reason
    const [lo, hi] = d.ranges[c];
    const tol = 1e-9 * Math.max(1.0, Math.abs(hi - lo), Math.abs(hi), Math.abs(lo));
    if (v < lo - tol) return [`${c} = ${withUnit(c, v)} is below the training range ${fmt(lo)}–${fmt(hi)}`];
    if (v > hi + tol) return [`${c} = ${withUnit(c, v)} is above the training range ${fmt(lo)}–${fmt(hi)}`];
    return [];
  }
  function givenInputsVerdict(d, values) { // lean.py's given_inputs_verdict: a stage not run, every target given
    const reasons = [];
    for (const c of d.inputs) {
      if (!(c in values)) continue;
      const v = values[c];
      if (!Number.isFinite(v)) reasons.push(`${c} is missing`); else reasons.push(...rangeReason(d, c, v));
    }
    return { in_domain: reasons.length === 0, t2: null, t2_limit: d.t2_limit, q: null, q_limit: d.q_limit, reasons,
      checked: "training ranges of the given inputs only (the stage was not run: every target of it was given)" };
  }
  function domainVerdict(d, rowv) {
    const level = String(Math.round(100 * (1 - d.alpha) * 1e9) / 1e9) + "%";
    const names = d.inputs, p = names.length, reasons = [];
    names.forEach((c, j) => { reasons.push(...rangeReason(d, c, rowv[j])); });
    const A = d.rotations.shape[1];
    const z = new Float64Array(p), t = new Float64Array(A);
    for (let j = 0; j < p; j++) z[j] = (rowv[j] - d.mean[j]) / d.scale[j];
    for (let a = 0; a < A; a++) { let s = 0; for (let j = 0; j < p; j++) s += z[j] * at2(d.rotations, j, a); t[a] = s; }
    const t2c = new Float64Array(p), qc = new Float64Array(p);
    if (d.n_components) {
      for (let j = 0; j < p; j++) {
        let s = 0;
        for (let a = 0; a < A; a++) s += at2(d.rotations, j, a) * (t[a] / d.score_var[a]);
        t2c[j] = z[j] * s;
      }
    }
    for (let j = 0; j < p; j++) {
      let s = 0;
      for (let a = 0; a < A; a++) s += at2(d.loadings, j, a) * t[a];
      qc[j] = (z[j] - s) ** 2;
    }
    let t2 = 0, q = 0;
    for (let j = 0; j < p; j++) { t2 += t2c[j]; q += qc[j]; }
    const argmax = (a) => a.indexOf(Math.max(...a));
    if (d.t2_limit !== null && t2 > d.t2_limit) {
      const [shownT2, limitT2] = fmtBeyond(t2, d.t2_limit);
      reasons.push(`Hotelling T² ${shownT2} above its ${level} limit ${limitT2} (driven by ${names[argmax(Array.from(t2c))]})`);
    }
    if (d.q_limit !== null && q > d.q_limit) {
      const [shownQ, limitQ] = fmtBeyond(q, d.q_limit);
      reasons.push(`Q residual (squared prediction error) ${shownQ} above its ${level} limit ${limitQ} (driven by ${names[argmax(Array.from(qc))]})`);
    }
    return { in_domain: reasons.length === 0, t2, t2_limit: d.t2_limit, q, q_limit: d.q_limit, reasons };
  }

  // ---------------------------------------------------------------- Monte Carlo (propagate.simulate, one row)
  const N = M.n_draws;
  function simulate(filled) {
    const values = {}, means = {}, raw = {}, rawMeans = {};
    for (const [k, v] of Object.entries(filled)) { values[k] = v; means[k] = v; } // a number: the same in every draw
    const fixed = new Set(Object.keys(filled));
    const logs = new Map();
    for (const st of M.stages) {
      const todo = st.targets.filter((t) => !fixed.has(t.target));
      if (!todo.length) continue;
      for (const t of todo) {
        const j = st.targets.indexOf(t), p = t.inputs.length;
        const preds = predictMany(t.model, t.inputs.map((c) => values[c]), N, logs);
        const r = new Float64Array(N), out = new Float64Array(N);
        const lots = t.mc_lots;
        for (let d = 0; d < N; d++) {
          const pred = preds[d], lot = lots[d];
          if (!t.spread) r[d] = pred + at2(st.residual_matrix, lot, j);
          else r[d] = pred + (at2(st.residual_matrix, lot, j) / at2(st.residual_scale, lot, j)) * spreadScale(t.spread, pred);
          out[d] = clip(r[d], lowEnd(t.physical_range), highEnd(t.physical_range));
        }
        raw[t.target] = r;
        values[t.target] = out;
        rawMeans[t.target] = predictOne(t.model, t.inputs.map((c) => means[c]));
        means[t.target] = clip(rawMeans[t.target], lowEnd(t.physical_range), highEnd(t.physical_range));
      }
    }
    return { values, means, raw, rawMeans, fixed };
  }
  function within(v, lim) { return (lim.min === null || v >= lim.min) && (lim.max === null || v <= lim.max); }

  // ---------------------------------------------------------------- USP <711> stages (compendial.judge_draws)
  function judgeDissolution(draws, qPct) {
    const D = M.dissolution, md = draws.values.dissolution_pct;
    const varAt = new Float64Array(N);
    for (let d = 0; d < N; d++) varAt[d] = Math.exp(interp(md[d], D.grid, D.log_var));
    const sv = mean(varAt) / D.units_per_lot;
    const centre = mean(md);
    const dev = new Float64Array(N);
    for (let d = 0; d < N; d++) dev[d] = Math.abs(md[d] - centre) ** 2;
    const total = mean(dev);
    const c = total > 0 ? Math.sqrt(clip(1.0 - sv / total, 0.0, 1.0)) : 0.0;
    const V = D.vessels, S = { S1: new Uint8Array(N), S2: new Uint8Array(N), S3: new Uint8Array(N) };
    const unit = (mu, sd, z) => clip(mu + sd * z, RELEASE[0], RELEASE[1]);
    for (let d = 0; d < N; d++) {
      const mu = centre + c * (md[d] - centre);
      const sd = Math.sqrt(Math.exp(interp(mu, D.grid, D.log_var)));
      const s1 = unit(mu, sd, V[d]) >= qPct + 5 - TOL; // row 0: min of the first 6
      const s2 = (mu + sd * V[2 * N + d] >= qPct - TOL) && unit(mu, sd, V[N + d]) >= qPct - 15 - TOL;
      const s3 = (mu + sd * V[5 * N + d] >= qPct - TOL) && !(unit(mu, sd, V[4 * N + d]) < qPct - 15 - TOL)
        && !(unit(mu, sd, V[3 * N + d]) < qPct - 25 - TOL);
      S.S1[d] = s1; S.S2[d] = s1 || s2; S.S3[d] = s1 || s2 || s3;
    }
    return S;
  }

  // ---------------------------------------------------------------- the bound (bound.chain_probabilities)
  function unpack(p) { // bootstrap.unpack_specs
    const n = p.n, specs = [];
    for (let b = 0; b < n; b++) specs.push(Object.assign({}, p.same));
    for (const [k, a] of Object.entries(p.stacked)) {
      const inner = a.shape.slice(1), size = inner.reduce((x, y) => x * y, 1);
      for (let b = 0; b < n; b++) {
        if (!inner.length) specs[b][k] = a[b];
        else { const v = a.subarray(b * size, (b + 1) * size); v.shape = inner; specs[b][k] = v; }
      }
    }
    for (const [k, r] of Object.entries(p.ragged)) {
      const nd = r.shapes.shape[1] || 0;
      let start = 0;
      for (let b = 0; b < n; b++) {
        const shp = Array.from(r.shapes.subarray(b * nd, (b + 1) * nd));
        const size = shp.reduce((x, y) => x * y, 1);
        const v = r.flat.subarray(start, start + size); v.shape = shp; specs[b][k] = v;
        start += size;
      }
    }
    return specs;
  }
  const targetsByName = {};
  for (const st of M.stages) for (const t of st.targets) targetsByName[t.target] = t;
  const REPS = M.bound.available ? (() => {
    const out = {};
    for (const [name, p] of Object.entries(M.bound.targets)) out[name] = unpack(p);
    return out;
  })() : null;

  // The lots every draw of the bound's sums takes, and the weights, depend on the replicate's
  // counts and the stored uniforms only, not on the settings: made once per replicate (a "plan"),
  // then each update only predicts and compares. The page sets settings only, so every stage is
  // simulated and every target of a stage is to do.
  const STAGE_LOTS = M.stages.map((st) => { // bound._stage_lots: rows with every target, residuals lot-major
    const T = st.targets.length, rows = [];
    for (let i = 0; i < st.residual_lots.length; i++) {
      let all = true;
      for (let j = 0; j < T; j++) if (!Number.isFinite(at2(st.residual_matrix, i, j) / at2(st.residual_scale, i, j))) all = false;
      if (all) rows.push(i);
    }
    // each residual divided by the spread at the lot's own level (ones without a spread model)
    const R = st.targets.map((t, j) => Float64Array.from(rows, (i) => at2(st.residual_matrix, i, j) / at2(st.residual_scale, i, j)));
    return { rows, R };
  });
  function stageWeights(si, counts, b) { // W of bound._stage_lots for one replicate (counts null: the point)
    const rows = STAGE_LOTS[si].rows, W = new Float64Array(rows.length);
    rows.forEach((i, k) => {
      if (counts === null) W[k] = 1;
      else { const at = M.bound.stage_lots[si][i]; W[k] = at >= 0 ? counts[b * counts.shape[1] + at] : 0; }
    });
    let total = 0;
    for (let k = 0; k < W.length; k++) total += W[k];
    for (let k = 0; k < W.length; k++) W[k] = W[k] / total;
    return W;
  }
  function drawLots(W, u) { // bound._draw for one replicate
    const cdf = new Float64Array(W.length);
    let s = 0;
    for (let k = 0; k < W.length; k++) { s += Number.isNaN(W[k]) ? 0 : W[k]; cdf[k] = s; }
    cdf[W.length - 1] = Infinity;
    return Int32Array.from(u, (x) => { let lo = 0, hi = cdf.length; while (lo < hi) { const m = (lo + hi) >> 1; if (cdf[m] <= x) lo = m + 1; else hi = m; } return lo; });
  }
  function makePlan(counts, b) { // bound._batch's lots and weights, B = 1, one row
    let w = Float64Array.of(1.0);
    const steps = [];
    const S = M.stages.length;
    for (let si = 0; si < S; si++) {
      const W = stageWeights(si, counts, b), nS = W.length, D = w.length, u = M.bound.uniforms[si];
      if (si < S - 1) {
        let parent, pick, wNew;
        if (D * nS <= M.bound.cells) {
          parent = new Int32Array(D * nS); pick = new Int32Array(D * nS); wNew = new Float64Array(D * nS);
          for (let d = 0, i = 0; d < D; d++) for (let l = 0; l < nS; l++, i++) { parent[i] = d; pick[i] = l; wNew[i] = w[d] * W[l]; }
        } else {
          const k = Math.max(1, Math.floor(M.bound.cells / D));
          parent = new Int32Array(D * k);
          for (let d = 0, i = 0; d < D; d++) for (let j = 0; j < k; j++, i++) parent[i] = d;
          pick = drawLots(W, u.subarray(0, D * k));
          wNew = Float64Array.from(parent, (d) => w[d] / k);
        }
        steps.push({ parent, pick });
        w = wNew;
      } else if (nS > M.bound.final_max) {
        steps.push({ pick: drawLots(W, u.subarray(0, M.bound.final_max)), lw: new Float64Array(M.bound.final_max).fill(1.0 / M.bound.final_max) });
      } else {
        steps.push({ pick: Int32Array.from(W, (_, k) => k), lw: W });
      }
    }
    // the last stage: each target's residuals at the picked lots, sorted, with their lot positions
    const last = steps[S - 1], R = STAGE_LOTS[S - 1].R, L = last.lw.length;
    const T = R.length, RL = new Float64Array(L * T); // lot-major: RL[l * T + j]
    const sorted = R.map((col, j) => {
      const r = Float64Array.from(last.pick, (l) => col[l]);
      for (let l = 0; l < L; l++) RL[l * T + j] = r[l];
      const order = Int32Array.from(r, (_, i) => i).sort((a, b) => r[a] - r[b] || a - b);
      const prefix = new Float64Array(L + 1); // Σ lw over the first i lots in this order
      for (let i = 0; i < L; i++) prefix[i + 1] = prefix[i] + last.lw[order[i]];
      return { r: Float64Array.from(order, (i) => r[i]), order, prefix };
    });
    let lwTotal = 0;
    for (let l = 0; l < L; l++) lwTotal += last.lw[l];
    return { steps, w, sorted, RL, T, lwTotal, mark: new Int32Array(L), stamp: 0 };
  }
  let PLANS = null;
  function plans() {
    if (PLANS === null) {
      PLANS = { point: makePlan(null, 0), reps: [] };
      if (M.bound.available) for (let b = 0; b < M.bound.counts.shape[0]; b++) PLANS.reps.push(makePlan(M.bound.counts, b));
    }
    return PLANS;
  }
  // P(all pass) and P(pass) per attribute for one replicate's models (bound._batch, B = 1, one row)
  function batchOne(filled, limits, attributes, modelOf, plan) {
    const S = M.stages.length, vals = Object.assign({}, filled);
    let ok = Uint8Array.of(1), each = {}, pAll = null;
    const pEach = {};
    // buffers kept with the plan and reused at every update (the same shapes each time): no garbage
    const pool = plan.pool || (plan.pool = { arrays: [], next: 0 });
    pool.next = 0;
    const alloc = (n, Type = Float64Array) => {
      let a = pool.arrays[pool.next];
      if (!a || a.length !== n || !(a instanceof Type)) { a = new Type(n); pool.arrays[pool.next] = a; }
      pool.next++;
      return a;
    };
    const logs = new Map();
    logs.alloc = alloc;
    const predictAt = (t, m, D) => predictMany(m, t.inputs.map((c) => vals[c]), D, logs, alloc(D));
    let D = 1;
    for (let si = 0; si < S; si++) {
      const st = M.stages[si], step = plan.steps[si], R = STAGE_LOTS[si].R;
      if (si < S - 1) {
        // predictions at the parents' inputs are the predictions at the expanded inputs (the same numbers)
        const preds = st.targets.map((t) => predictAt(t, modelOf(t.target), D));
        const parent = step.parent, n = parent.length;
        const expand = (v, out) => { for (let i = 0; i < n; i++) out[i] = v[parent[i]]; return out; };
        for (const c of Object.keys(vals)) if (typeof vals[c] !== "number") vals[c] = expand(vals[c], alloc(n));
        ok = expand(ok, alloc(n, Uint8Array));
        for (const a of Object.keys(each)) each[a] = expand(each[a], alloc(n, Uint8Array));
        st.targets.forEach((t, j) => {
          const pl = lowEnd(t.physical_range), ph = highEnd(t.physical_range), pr = preds[j], r = R[j], v = alloc(n);
          const sp = t.spread; // the residual times the spread at the draw's level, as the Monte Carlo does
          for (let i = 0; i < n; i++) {
            const p0 = pr[parent[i]];
            v[i] = clip(p0 + r[step.pick[i]] * (sp ? spreadScale(sp, p0) : 1.0), pl, ph);
          }
          vals[t.target] = v;
          if (attributes.includes(t.target)) {
            const lim = limits[t.target];
            each[t.target] = Uint8Array.from(v, (y) => within(y, lim));
            for (let i = 0; i < n; i++) ok[i] &= each[t.target][i];
          }
        });
        D = n;
      } else {
        const J = [];
        st.targets.forEach((t, j) => {
          if (!attributes.includes(t.target)) return;
          const lim = limits[t.target], pl = lowEnd(t.physical_range), ph = highEnd(t.physical_range);
          // bound._passing_run: the projection is a clip, so a limit inside the range compares the residual
          const useMin = lim.min !== null && lim.min > pl, useMax = lim.max !== null && lim.max < ph;
          const never = (useMin && lim.min > ph) || (useMax && lim.max < pl);
          const pred = predictAt(t, modelOf(t.target), D);
          let scale = null;
          if (t.spread) { scale = alloc(D); for (let d = 0; d < D; d++) scale[d] = spreadScale(t.spread, pred[d]); }
          J.push({ name: t.target, j, pred, scale, useMin, useMax, never, min: lim.min, max: lim.max });
        });
        // Σ_l lw[l]·pass(l) without visiting every lot: each target's residuals are sorted (once per
        // replicate), so the lots passing it are one run of that order, found by bisection, and its sum
        // is a difference of prefix sums; the lots passing every target are found from the shorter of
        // the failing lots (marked) and the shortest passing run (checked against the other targets).
        // The sums agree with the direct ones to rounding (~1e-16).
        const lw = step.lw, L = lw.length, w = plan.w, K = J.length, sorted = plan.sorted;
        const RL = plan.RL, T = plan.T, mark = plan.mark;
        const sums = new Float64Array(K), i0s = new Int32Array(K), i1s = new Int32Array(K);
        const los = new Float64Array(K), his = new Float64Array(K);
        const bisect = (r, x, right) => { // the number of r[i] < x (or <= x when right)
          let lo = 0, hi = r.length;
          while (lo < hi) { const m = (lo + hi) >> 1; if (right ? r[m] <= x : r[m] < x) lo = m + 1; else hi = m; }
          return lo;
        };
        let sumAll = 0, stamp = plan.stamp;
        for (let d = 0; d < D; d++) {
          let fails = 0, best = -1, bestRun = L + 1, empty = false;
          for (let k = 0; k < K; k++) {
            const Jk = J[k], sk = sorted[Jk.j];
            const sd = Jk.scale === null ? 1.0 : Jk.scale[d]; // pass: r >= (min - pred)/s, r <= (max - pred)/s
            const lo = Jk.never ? Infinity : Jk.useMin ? (Jk.min - Jk.pred[d]) / sd : -Infinity;
            const hi = Jk.useMax ? (Jk.max - Jk.pred[d]) / sd : Infinity;
            let i0 = 0, i1 = 0;
            if (!(Jk.never || Number.isNaN(lo) || Number.isNaN(hi))) { // a comparison with NaN fails
              i0 = bisect(sk.r, lo, false);
              i1 = Math.max(i0, bisect(sk.r, hi, true));
            }
            i0s[k] = i0; i1s[k] = i1; los[k] = lo; his[k] = hi;
            sums[k] += (i1 > i0 ? sk.prefix[i1] - sk.prefix[i0] : 0) * w[d];
            fails += L - (i1 - i0);
            if (i1 - i0 < bestRun) { bestRun = i1 - i0; best = k; }
            if (i1 === i0) empty = true;
          }
          let perAll;
          if (ok[d] !== 1 || (K && empty)) perAll = 0;
          else if (!K) perAll = L === 1 ? lw[0] : 1;
          else if (fails <= bestRun * K) { // few failures: the total less the lots failing any target
            stamp++;
            let failAll = 0;
            for (let k = 0; k < K; k++) {
              const sk = sorted[J[k].j];
              for (let i = 0; i < i0s[k]; i++) { const l = sk.order[i]; if (mark[l] !== stamp) { mark[l] = stamp; failAll += lw[l]; } }
              for (let i = i1s[k]; i < L; i++) { const l = sk.order[i]; if (mark[l] !== stamp) { mark[l] = stamp; failAll += lw[l]; } }
            }
            perAll = plan.lwTotal - failAll;
          } else { // the shortest passing run, each lot checked against the other targets
            perAll = 0;
            const sb = sorted[J[best].j];
            for (let i = i0s[best]; i < i1s[best]; i++) {
              const l = sb.order[i];
              let all = true;
              for (let k = 0; all && k < K; k++) {
                if (k === best) continue;
                const r = RL[l * T + J[k].j];
                all = r >= los[k] && r <= his[k];
              }
              if (all) perAll += lw[l];
            }
          }
          sumAll += perAll * w[d];
        }
        plan.stamp = stamp;
        J.forEach((Jk, k) => { pEach[Jk.name] = sums[k]; });
        pAll = sumAll;
      }
    }
    for (const [a, e] of Object.entries(each)) { let s = 0; e.forEach((v, d) => { if (v) s += plan.w[d]; }); pEach[a] = s; }
    if (pAll === null) { let s = 0; ok.forEach((v, d) => { if (v) s += plan.w[d]; }); pAll = s; }
    return { pAll, pEach };
  }
  function chainProbabilities(filled, limits, attributes) {
    const P = plans();
    const point = batchOne(filled, limits, attributes, (t) => targetsByName[t].model, P.point);
    if (!M.bound.available) return { point, reps: null };
    const B = P.reps.length, all = new Float64Array(B), each = {};
    for (const a of Object.keys(point.pEach)) each[a] = new Float64Array(B);
    for (let b = 0; b < B; b++) {
      const r = batchOne(filled, limits, attributes, (t) => REPS[t][b], P.reps[b]);
      all[b] = r.pAll;
      for (const a of Object.keys(each)) each[a][b] = r.pEach[a];
    }
    return { point, reps: { all, each } };
  }
  function lowerBound(reps, assurance, point) { return Math.min(nanquantile(reps, 1 - assurance), point); }
  function withUnitLevel(low, lot, units) { // bound.with_unit_level
    const ratio = lot > 0 ? units / lot : 0.0;
    return Math.min(low * clip(ratio, 0.0, 1.0), units);
  }

  // ---------------------------------------------------------------- the what-if (whatif.predict_whatif)
  function whatif(given) {
    const level = M.level, assurance = M.assurance;
    const t0 = performance.now();
    const { values: filled, source } = fillSettings(given);
    const draws = simulate(filled);
    const t1 = performance.now();
    const q = (1 - level) / 2;
    const predictions = {}, domain = {}, reasons = [];
    const limits = M.limits;
    const passAll = new Uint8Array(N).fill(1);
    let anySpec = false;
    const stagesJudged = M.dissolution && ("dissolution_pct" in limits) ? judgeDissolution(draws, limits.dissolution_pct.min) : null;
    for (const st of M.stages) {
      const todo = st.targets.filter((t) => !draws.fixed.has(t.target));
      if (!todo.length) { // whatif._stage_predictions: the stage is not run, the values given to it are checked
        if (st.domain) {
          const given = {};
          for (const c of st.inputs) if (draws.fixed.has(c)) given[c] = draws.means[c];
          const v = givenInputsVerdict(st.domain, given);
          domain[st.name] = v;
          for (const r of v.reasons) reasons.push(`${st.name} stage: ${r}`);
        }
        continue;
      }
      const xIn = st.inputs.map((c) => draws.means[c]);
      const v = domainVerdict(st.domain, st.domain.inputs.map((c) => draws.means[c]));
      domain[st.name] = v;
      for (const r of v.reasons) reasons.push(`${st.name} stage: ${r}`);
      const known = st.inputs.every((c) => draws.fixed.has(c));
      for (const t of todo) {
        const name = t.target, pl = lowEnd(t.physical_range), ph = highEnd(t.physical_range);
        const vals = draws.values[name];
        let low, high, rawLow, rawHigh, method;
        if (known) {
          [rawLow, rawHigh] = interval(t, t.inputs.map((c) => draws.means[c]), level);
          method = t.spread ? "locally weighted cv+ conformal" : "cv+ conformal";
          low = clip(rawLow, pl, ph); high = clip(rawHigh, pl, ph);
        } else {
          [low, high] = quantiles(vals, [q, 1 - q]);
          [rawLow, rawHigh] = quantiles(draws.raw[name], [q, 1 - q]);
          method = "monte carlo through the chain";
        }
        const value = draws.means[name], rawValue = draws.rawMeans[name];
        const entry = { value, low, high, interval_method: method, selected_model: t.selected,
          projected: value !== rawValue || low !== rawLow || high !== rawHigh,
          unprojected: { value: rawValue, low: rawLow, high: rawHigh }, physical_range: t.physical_range };
        if (name in limits) {
          let okd;
          if (stagesJudged && name === "dissolution_pct") {
            okd = stagesJudged[M.dissolution.pass_by];
            entry.judge = "stages"; entry.pass_by = M.dissolution.pass_by;
            entry.p_stage = {};
            for (const k of ["S1", "S2", "S3"]) { let s = 0; stagesJudged[k].forEach((x) => { s += x; }); entry.p_stage[k] = s / N; }
          } else okd = Uint8Array.from(vals, (x) => within(x, limits[name]));
          let s = 0;
          for (let d = 0; d < N; d++) { s += okd[d]; passAll[d] &= okd[d]; }
          entry.p_pass = s / N;
          entry.limits = limits[name];
          if (!entry.judge) entry.judge = "mean";
          anySpec = true;
        }
        predictions[name] = entry;
        void xIn;
      }
    }
    let pAllLow = null, boundReason = null;
    const bounded = Object.keys(predictions).filter((n) => "p_pass" in predictions[n] && n in limits);
    let sumAll = 0;
    passAll.forEach((x) => { sumAll += x; });
    const pPassAll = anySpec ? sumAll / N : null;
    const t2 = performance.now();
    if (bounded.length) {
      const cp = chainProbabilities(filled, limits, bounded);
      const lowEach = {};
      if (!cp.reps) boundReason = M.bound.reason;
      else {
        pAllLow = lowerBound(cp.reps.all, assurance, cp.point.pAll);
        for (const n of bounded) lowEach[n] = lowerBound(cp.reps.each[n], assurance, cp.point.pEach[n]);
        if (stagesJudged) {
          pAllLow = withUnitLevel(pAllLow, cp.point.pAll, sumAll / N);
          if ("dissolution_pct" in lowEach)
            lowEach.dissolution_pct = withUnitLevel(lowEach.dissolution_pct, cp.point.pEach.dissolution_pct, predictions.dissolution_pct.p_pass);
        }
      }
      for (const n of bounded) {
        predictions[n].p_pass_low = cp.reps ? lowEach[n] : null;
        predictions[n].p_pass_point = cp.point.pEach[n];
      }
    }
    const inputs = {};
    for (const k of Object.keys(filled)) inputs[k] = { value: filled[k], source: source[k] };
    window.linkageProfile = { simulate: t1 - t0, judge: t2 - t1, bound: performance.now() - t2 };
    return { model_id: M.model_id, interval_level: level, inputs, predictions, p_pass_all: pPassAll,
      in_domain: reasons.length === 0, domain_reasons: reasons, domain,
      p_pass_all_bound: { assurance, low: pAllLow, reason: boundReason } };
  }

  // ---------------------------------------------------------------- the page
  const app = document.getElementById("app");
  const el = (tag, attrs, ...kids) => {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (k === "class") e.className = v; else if (k === "text") e.textContent = v; else e.setAttribute(k, v);
    }
    for (const k of kids) e.append(k);
    return e;
  };
  const num = (v, d = 4) => (v === null || v === undefined ? "–" : !Number.isFinite(v) ? (v > 0 ? "∞" : "−∞") : fmt(Number(v.toPrecision(d))));
  const pct = (v) => (v === null || v === undefined || Number.isNaN(v) ? "–"
    : v > 0.999 ? "> 99.9%" : v < 0.001 ? "< 0.1%" : (100 * v).toFixed(1) + "%");
  // an assurance or confidence as a percent with the digits given (linkage.numbers.percent_text): 0.9 -> "90%"
  const share = (v) => `${+(100 * v).toFixed(4)}%`;
  // a lower bound in words, as sheet.at_least writes it: never "at least < 0.1%" or "at least > 99.9%"
  const atLeast = (v) => { const t = pct(v); return t.startsWith(">") ? t
    : t.startsWith("<") ? `under ${t.slice(1).trim()} at its lower bound` : `at least ${t}`; };

  // A number box shows a setting to the decimals of its slider's step (a thousandth of the training range), trailing
  // zeros dropped: 2.417409174 shows as 2.417. The value computed with stays the full one: the box keeps it
  // (box.exact) until its text is edited, and given() takes it while the box still shows it.
  const stepDecimals = (s) => Math.min(12, Math.max(0, Math.ceil(-Math.log10((s.high - s.low) / 1000) - 1e-9)));
  const boxText = (s, v) => String(Number(Number(v).toFixed(stepDecimals(s))));
  function showValue(s, box, v) { box.exact = Number(v); box.value = boxText(s, v); }
  function boxValue(s, box) { return box.exact !== undefined && box.value === boxText(s, box.exact) ? box.exact : Number(box.value); }
  // the stage probabilities as predict writes them (results.stage_text): "at S1 79.0%, by S2 > 99.9%, by S3 > 99.9%"
  const stageText = (pStage) => Object.entries(pStage).map(([k, v], i) => `${i === 0 ? "at" : "by"} ${k.startsWith("S") ? k : "stage " + k} ${pct(v)}`).join(", ");

  function build() {
    app.textContent = "";
    app.append(el("h1", { text: "What-if, model " + M.model_id }));
    const meta = el("p", { class: "meta" });
    meta.textContent = `Model ${M.model_id} (trained ${M.trained}); intervals at ${(100 * M.level).toFixed(0)}%; ` +
      `lower bounds at assurance ${share(M.assurance)}; ${N} Monte Carlo draws, seed ${M.seed}. ` +
      (M.spec ? `Spec ${M.spec.file || ""} (SHA-256 ${(M.spec.sha256 || "").slice(0, 12)}…): ` +
        Object.entries(M.spec.attributes).map(([a, s]) => `${a} ${limitsText(s.limits)}${s.judge !== "mean" ? " (" + s.judge + ")" : ""}`).join("; ")
        : "No spec given: no probability of passing.");
    app.append(meta);
    if (M.trained_on) app.append(el("p", { class: "products", id: "trained-on", text: M.trained_on }));
    app.append(el("p", { class: "caution", text: M.caution }));
    const controls = el("section", { id: "controls" }, el("h2", { text: "Settings" }));
    const table = el("table", { class: "settings" });
    table.append(el("tr", {}, el("th", { class: "set", text: "set" }), el("th", { text: "setting" }), el("th", { text: "training range" }),
      el("th", { text: "value" }), el("th", { class: "slider", text: "" }), el("th", { text: "held at / source" })));
    for (const s of M.settings) {
      const step = (s.high - s.low) / 1000;
      const start = s.name in M.initial ? M.initial[s.name] : s.median;
      const check = el("input", { type: "checkbox", id: "set-" + s.name, "data-setting": s.name });
      const slider = el("input", { type: "range", id: "slider-" + s.name, min: s.low, max: s.high, step, value: start });
      const box = el("input", { type: "number", id: "value-" + s.name, min: s.low, max: s.high, step: "any" });
      showValue(s, box, start);
      check.checked = s.name in M.initial;
      const srcCell = el("td", { id: "source-" + s.name });
      check.addEventListener("change", update);
      slider.addEventListener("input", () => { showValue(s, box, slider.value); check.checked = true; update(); });
      box.addEventListener("input", () => { box.exact = undefined; slider.value = box.value; check.checked = true; update(); });
      table.append(el("tr", {}, el("td", { class: "set" }, check), el("td", { text: heading(s.name, s.unit) }),
        el("td", { text: `${fmt(s.low)} – ${fmt(s.high)}` }), el("td", {}, box), el("td", { class: "slider" }, slider), srcCell));
    }
    controls.append(table);
    controls.append(el("p", { class: "note noprint", text: "A setting not ticked is held as the what-if holds it (" +
      (M.settings_mean ? "its conditional mean given the ticked ones, under the normal model of the training settings" : "its training median") + ")." }));
    app.append(controls);
    app.append(el("section", { id: "results" }));
    app.append(el("section", { id: "window" }));
    app.append(el("section", { id: "domain" }));
    app.append(el("p", { class: "timing", id: "timing" }));
  }

  function given() {
    const out = {};
    for (const s of M.settings) {
      if (document.getElementById("set-" + s.name).checked) out[s.name] = boxValue(s, document.getElementById("value-" + s.name));
    }
    return out;
  }

  function renderWindow(r) {
    const sec = document.getElementById("window");
    sec.textContent = "";
    sec.append(el("h2", { text: "Ribbon porosity window" }));
    const W = M.window && M.window.ribbon_porosity, pred = r.predictions.ribbon_porosity;
    if (!W || W.low === null || W.low === undefined) {
      sec.append(el("p", { class: "note", text: M.window ? "The window file gives no porosity window (none found)." :
        "Not drawn: the model carries no porosity window (give one with --page-window, the output of 'linkage window --json')." }));
      return;
    }
    const lo = Math.min(W.data_range ? W.data_range[0] : W.low, pred ? pred.low : W.low, W.low);
    const hi = Math.max(W.data_range ? W.data_range[1] : W.high, pred ? pred.high : W.high, W.high);
    const X = (v) => 30 + 540 * (v - lo) / (hi - lo || 1);
    const ns = "http://www.w3.org/2000/svg";
    const svg = document.createElementNS(ns, "svg");
    svg.setAttribute("viewBox", "0 0 600 70"); svg.setAttribute("class", "windowplot");
    const add = (tag, a) => { const e = document.createElementNS(ns, tag); for (const [k, v] of Object.entries(a)) e.setAttribute(k, v); svg.append(e); return e; };
    add("line", { x1: 30, x2: 570, y1: 40, y2: 40, stroke: "#888" });
    add("rect", { x: X(W.low), y: 25, width: Math.max(1, X(W.high) - X(W.low)), height: 30, fill: "#cde8cd", stroke: "#2a7a2a" });
    if (pred) {
      add("line", { x1: X(clip(pred.low, lo, hi)), x2: X(clip(pred.high, lo, hi)), y1: 40, y2: 40, stroke: "#1f4e9e", "stroke-width": 3 });
      add("circle", { cx: X(pred.value), cy: 40, r: 5, fill: "#1f4e9e" });
    }
    for (const [v, t] of [[lo, fmt(lo)], [W.low, fmt(W.low)], [W.high, fmt(W.high)], [hi, fmt(hi)]]) {
      const e = add("text", { x: X(v), y: 68, "text-anchor": "middle", "font-size": 10 }); e.textContent = t;
    }
    sec.append(svg);
    sec.append(el("p", { class: "note", text: `Window ${fmt(W.low)} – ${fmt(W.high)} (confidence ${M.window.confidence}, model ${M.window.model_id}); ` +
      (pred ? `predicted porosity ${fmt(pred.value)} (${fmt(pred.low)} – ${fmt(pred.high)}) in blue.` : "") +
      " The window was found at the settings of that window run, not at the ones above." }));
  }

  // The headline on passing every limit, as the sheet and predict's text put it (sheet.NO_PROMISE, the sheet's
  // probability paragraph): outside the applicability domain, or without a lower bound, it says first that no
  // probability is promised; the numbers follow, named for what they are. Inside, with a bound: the numbers.
  function allText(r) {
    const b = r.p_pass_all_bound;
    if (r.p_pass_all === null) return el("p", { class: "all", id: "p-all", text: "No spec: no probability of passing." });
    const numbers = `P(all pass) ${pct(r.p_pass_all)}; ${atLeast(b.low)} with assurance ${share(b.assurance)}`;
    if (!r.in_domain)
      return el("p", { class: "all out", id: "p-all" }, el("b", { text: M.no_promise }),
        document.createTextNode(` The numbers are extrapolations of the models, shown for orientation only: ${numbers}` +
          (b.reason ? ` (${b.reason})` : "") + ". The reasons are under Applicability domain below."));
    if (b.low === null || b.low === undefined)
      return el("p", { class: "all out", id: "p-all" }, el("b", { text: "No probability of passing every limit is promised here" }),
        document.createTextNode(` (no lower bound${b.reason ? ": " + b.reason : ""}). The point estimate is P(all pass) ${pct(r.p_pass_all)}.`));
    return el("p", { class: "all", id: "p-all", text: numbers });
  }

  function render(r) {
    for (const s of M.settings) {
      const inp = r.inputs[s.name];
      // the value as its number box shows it (the same decimals), then where it comes from: "10.198, given"
      document.getElementById("source-" + s.name).textContent = inp ? `${boxText(s, inp.value)}, ${inp.source}` : "";
      if (inp && inp.source !== "given") {
        showValue(s, document.getElementById("value-" + s.name), inp.value);
        document.getElementById("slider-" + s.name).value = inp.value;
      }
    }
    const sec = document.getElementById("results");
    sec.textContent = "";
    sec.append(el("h2", { text: "Predicted" }));
    const t = el("table", { class: "predictions" });
    // a numeric column's heading is right-aligned, over its numbers (class num)
    const head = (h, i, numeric) => el("th", numeric.includes(i) ? { class: "num", text: h } : { text: h });
    t.append(el("tr", {}, ...["attribute", "predicted", `${(100 * M.level).toFixed(0)}% interval`, "limits", "P(pass)",
      `at least (assurance ${share(M.assurance)})`, "model", "interval"].map((h, i) => head(h, i, [1, 2, 4, 5]))));
    for (const [name, p] of Object.entries(r.predictions)) {
      const lim = p.limits ? [p.limits.min !== null ? "≥ " + fmt(p.limits.min) : "", p.limits.max !== null ? "≤ " + fmt(p.limits.max) : ""].filter(Boolean).join(", ") : "";
      const tr = el("tr", { "data-attribute": name }, el("td", { text: heading(name, M.units[name]) }),
        el("td", { class: "num", text: num(p.value) }), el("td", { class: "num", text: `${num(p.low)} – ${num(p.high)}` }),
        el("td", { text: lim + (p.judge === "stages" ? ` (USP <711> by ${p.pass_by})` : "") }),
        el("td", { class: "num", text: p.p_pass === undefined ? "" : pct(p.p_pass) }),
        el("td", { class: "num", text: p.p_pass_low === undefined ? "" : pct(p.p_pass_low) }),
        el("td", { text: p.selected_model }), el("td", { text: p.interval_method }));
      const shade = p.p_pass === undefined ? "" : p.p_pass_low !== undefined && p.p_pass_low !== null && p.p_pass_low >= 0.9 ? "good" : "watch";
      if (shade) tr.classList.add(shade);
      t.append(tr);
      if (p.p_stage) // the USP <711> stages (a spec judging dissolution by stages), as predict and the sheet give them
        t.append(el("tr", { class: ("stages " + shade).trim(), "data-attribute": name }, el("td", { colspan: 8, class: "note",
          text: `${name}, USP <711> stages: ${stageText(p.p_stage)} (passing by that stage, point estimates; ` +
            `P(pass) above is by ${p.pass_by})` })));
    }
    sec.append(t);
    sec.append(allText(r));
    renderWindow(r);
    const dsec = document.getElementById("domain");
    dsec.textContent = "";
    dsec.append(el("h2", { text: "Applicability domain: " + (r.in_domain ? "inside" : "OUTSIDE (the numbers are extrapolations: shown, not promised)") }));
    const dt = el("table", { class: "domain" });
    dt.append(el("tr", {}, ...["stage", "T²", "T² limit", "Q", "Q limit", "verdict"].map((h, i) => head(h, i, [1, 2, 3, 4]))));
    for (const [name, d] of Object.entries(r.domain))
      dt.append(el("tr", { class: d.in_domain ? "good" : "bad" }, el("td", { text: name }), el("td", { class: "num", text: num(d.t2) }),
        el("td", { class: "num", text: num(d.t2_limit) }), el("td", { class: "num", text: num(d.q) }), el("td", { class: "num", text: num(d.q_limit) }),
        el("td", { text: d.in_domain ? "inside" : d.reasons.map(shownUnitsText).join("; ") })));
    dsec.append(dt);
  }

  function update() {
    const t0 = performance.now();
    let r;
    try {
      r = whatif(given());
      render(r);
      window.linkageError = null;
    } catch (e) {
      window.linkageError = String(e && e.message || e);
      document.getElementById("results").textContent = "Cannot compute: " + window.linkageError;
      return;
    }
    const ms = performance.now() - t0;
    window.linkageLast = r;
    window.linkageLastMs = ms;
    document.getElementById("timing").textContent = `Computed in the browser in ${ms.toFixed(1)} ms.`;
    document.body.setAttribute("data-result", JSON.stringify(r));
  }

  window.linkageWhatIf = whatif; // for tests: the result at any given settings, in full precision
  window.linkageFillSettings = fillSettings;
  window.linkageModel = M; // the embedded numbers, decoded
  build();
  update();
})();
