/**
 * The "Quick look" section of a job's details: the sky density map and a histogram of a
 * column the user picks, both drawn by the server from the cached result (no kernel).
 */
import { IQuickLookInfo, JobDeskModel } from './model';

export function quickLookSection(model: JobDeskModel, jobId: string): HTMLElement {
  const node = document.createElement('section');
  node.className = 'jd-quicklook';
  const h = document.createElement('h3');
  h.textContent = 'Quick look';
  const body = document.createElement('div');
  body.className = 'jd-quicklook-body';
  body.append(note('jd-muted', 'Reading the cached result…'));
  node.append(h, body);
  model.quickLookInfo(jobId).then(
    info => body.replaceChildren(...views(model, jobId, info)),
    err => body.replaceChildren(note('jd-error', (err as Error).message))
  );
  return node;
}

function views(model: JobDeskModel, jobId: string, info: IQuickLookInfo): HTMLElement[] {
  const out: HTMLElement[] = [];
  if (info.sky) {
    const sky = figure('jd-quicklook-sky', `Sky density (${info.sky.ra}, ${info.sky.dec})`);
    out.push(sky.node);
    draw(sky.image, model.quickLook(jobId, 'sky'));
  } else {
    out.push(note('jd-muted', 'No sky position columns (UCD pos.eq.ra / pos.eq.dec or ra/dec).'));
  }
  if (!info.numeric.length) {
    return out;
  }
  const hist = figure('jd-quicklook-hist', 'Histogram');
  const pick = document.createElement('select');
  pick.className = 'jd-quicklook-column';
  pick.id = `jd-ql-column-${jobId}`;
  for (const column of info.numeric) {
    const option = document.createElement('option');
    option.value = column.name;
    option.textContent = column.unit ? `${column.name} [${column.unit}]` : column.name;
    pick.append(option);
  }
  const label = document.createElement('label');
  label.htmlFor = pick.id;
  label.textContent = 'Column ';
  const go = document.createElement('button');
  go.type = 'button';
  go.className = 'jd-button jd-quicklook-draw';
  go.textContent = 'Draw histogram';
  go.addEventListener('click', () => draw(hist.image, model.quickLook(jobId, 'histogram', pick.value)));
  const controls = document.createElement('div');
  controls.className = 'jd-quicklook-controls';
  controls.append(label, pick, go);
  hist.node.insertBefore(controls, hist.image);
  hist.image.append(note('jd-muted', 'Pick a column and draw its histogram.'));
  out.push(hist.node);
  return out;
}

function figure(className: string, caption: string): { node: HTMLElement; image: HTMLElement } {
  const node = document.createElement('figure');
  node.className = `jd-quicklook-figure ${className}`;
  const image = document.createElement('div');
  image.className = 'jd-quicklook-image';
  image.setAttribute('aria-live', 'polite');
  const cap = document.createElement('figcaption');
  cap.textContent = caption;
  node.append(cap, image);
  return { node, image };
}

/** Put the server's SVG in place (parsed as SVG, never as HTML: no script can run). */
function draw(holder: HTMLElement, svg: Promise<string>): void {
  holder.replaceChildren(note('jd-muted', 'Drawing…'));
  holder.setAttribute('aria-busy', 'true');
  svg.then(
    text => {
      const doc = new DOMParser().parseFromString(text, 'image/svg+xml');
      const root = doc.documentElement;
      if (root.nodeName !== 'svg') {
        holder.replaceChildren(note('jd-error', 'The server sent no image.'));
        return;
      }
      root.querySelectorAll('script, foreignObject').forEach(n => n.remove());
      holder.replaceChildren(document.importNode(root, true));
    },
    err => holder.replaceChildren(note('jd-error', (err as Error).message))
  ).finally(() => holder.removeAttribute('aria-busy'));
}

function note(className: string, text: string): HTMLElement {
  const p = document.createElement('p');
  p.className = className;
  p.textContent = text;
  return p;
}
