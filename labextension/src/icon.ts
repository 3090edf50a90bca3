import { LabIcon } from '@jupyterlab/ui-components';

/** Three stacked record cards with a small clock: jobs kept over time. Drawn for jobdesk. */
const svg = `<svg xmlns="http://www.w3.org/2000/svg" width="16" height="16" viewBox="0 0 24 24">
  <g class="jp-icon3" fill="#616161">
    <rect x="2" y="3" width="13" height="4" rx="1"/>
    <rect x="2" y="10" width="10" height="4" rx="1"/>
    <rect x="2" y="17" width="8" height="4" rx="1"/>
    <path d="M17.5 10a4.5 4.5 0 1 0 0 9a4.5 4.5 0 0 0 0-9zm0 1.6a2.9 2.9 0 1 1 0 5.8a2.9 2.9 0 0 1 0-5.8zm-.6 1v2.5l2 1.2l.6-.9l-1.5-.9v-1.9z"/>
  </g>
</svg>`;

export const jobdeskIcon = new LabIcon({ name: 'jobdesk:sidebar', svgstr: svg });
