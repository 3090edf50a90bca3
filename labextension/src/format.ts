/**
 * Small pure formatting helpers shared by the list and the details view.
 */

/** Phases after which nothing more happens on the service (UWS 1.1 §2.1.3, plus our LOST). */
export const TERMINAL = new Set(['COMPLETED', 'ERROR', 'ABORTED', 'ARCHIVED', 'LOST']);

/** Phases worth watching: recorded here, waiting, or running on the service. */
export const ACTIVE = [
  'UNSENT',
  'SUBMITTED',
  'PENDING',
  'QUEUED',
  'EXECUTING',
  'UNKNOWN',
  'HELD',
  'SUSPENDED'
];

/** Filter choices of the phase menu: [label, comma-separated phases]. */
export const PHASE_FILTERS: Array<[string, string]> = [
  ['All phases', ''],
  ['Active', ACTIVE.join(',')],
  ['Completed', 'COMPLETED'],
  ['Failed', 'ERROR,LOST'],
  ['Aborted', 'ABORTED'],
  ['Queued', 'UNSENT,SUBMITTED,PENDING,QUEUED,HELD'],
  ['Executing', 'EXECUTING']
];

export function formatBytes(bytes: number | null | undefined): string {
  if (bytes === null || bytes === undefined) {
    return '';
  }
  const units = ['B', 'kB', 'MB', 'GB', 'TB'];
  let value = bytes;
  let unit = 0;
  while (value >= 1000 && unit < units.length - 1) {
    value /= 1000;
    unit += 1;
  }
  return unit === 0 ? `${value} B` : `${value.toFixed(value < 10 ? 1 : 0)} ${units[unit]}`;
}

export function formatDuration(seconds: number): string {
  const s = Math.max(0, Math.floor(seconds));
  if (s < 60) {
    return `${s} s`;
  }
  const m = Math.floor(s / 60);
  if (m < 60) {
    return `${m} min ${String(s % 60).padStart(2, '0')} s`;
  }
  const h = Math.floor(m / 60);
  if (h < 48) {
    return `${h} h ${String(m % 60).padStart(2, '0')} min`;
  }
  return `${Math.floor(h / 24)} d`;
}

export function formatRows(rows: number | null | undefined): string {
  return rows === null || rows === undefined ? '' : `${rows.toLocaleString('en-US')} rows`;
}

export function formatWhen(unixSeconds: number | null | undefined): string {
  if (!unixSeconds) {
    return '';
  }
  return new Date(unixSeconds * 1000).toISOString().replace('T', ' ').slice(0, 19) + ' UTC';
}

export function hostOf(service: string): string {
  try {
    return new URL(service).host;
  } catch {
    return service;
  }
}

export function baseName(path: string | null | undefined): string {
  if (!path) {
    return '';
  }
  const parts = path.split(/[\\/]/);
  return parts[parts.length - 1];
}

/** The first non-blank line of the query, used when a job has no label. */
export function firstLine(text: string | null | undefined): string {
  for (const line of (text || '').split('\n')) {
    if (line.trim()) {
      return line.trim();
    }
  }
  return '';
}
